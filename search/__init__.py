"""burstlens numerical engine: Gaussian-smoothed Wigner–Ville filterbanks scored by sharpness.

Names are imported lazily so that ``import search`` stays cheap (ObsPy, scikit-optimize and
joblib load only when the part that needs them is used).
"""
from importlib import import_module

__version__ = "0.1.0"

_EXPORTS = {
    "Channel": "burstlens.search.filterbank",
    "Filterbank": "burstlens.search.filterbank",
    "center_grid": "burstlens.search.filterbank",
    "transform": "burstlens.search.tfd",
    "prepare": "burstlens.search.tfd",
    "renyi_entropy": "burstlens.search.criteria",
    "Criterion": "burstlens.search.criteria",
    "read_corpus": "burstlens.search.corpus",
    "Corpus": "burstlens.search.corpus",
    "CorpusError": "burstlens.search.corpus",
    "FilterbankSearch": "burstlens.search.optimize",
}

__all__ = sorted(_EXPORTS)


def __getattr__(name):
    try:
        module = _EXPORTS[name]
    except KeyError:
        raise AttributeError(f"module 'search' has no attribute {name!r}") from None
    return getattr(import_module(module), name)

