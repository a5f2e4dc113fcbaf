"""The criteria's option sets and defaults: names only, no maths, so the job settings
(``search.settings``) and the CLI can check a criterion without loading numpy or scipy.

``search.criteria`` defines what each name computes; this module owns which names exist.
"""
from __future__ import annotations

# "detection" scores a corpus, not an image: the search's detection threshold (search.fit.detect)
CRITERIA = ("renyi", "concentration", "sparsity", "detection")
SPARSITY_MEASURES = ("gini", "hoyer")
# corpus reducers of per-window scores (search.criteria.reduce_scores)
REDUCERS = ("mean", "median", "trimmed")
# Every field of a criterion and its default. ``excess``: the search scores each burst's excess
# over its rows' own level (the site's steady sound removed, search.criteria.burst_excess);
# false scores whole windows.
CRITERION_DEFAULTS = {"name": "renyi", "alpha": 3.0, "p": 2.0, "measure": "gini",
                      "negative_mass_penalty": 0.0, "reduce": "mean", "excess": True}
