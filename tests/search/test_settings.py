"""Job settings: defaults, the corpus/search split, and errors that name the setting."""
import pytest

from search.settings import (SETTINGS_DEFAULTS, resolve_search_options, split_settings,
                             validate_settings)


def test_split_routes_every_key_and_fills_defaults():
    """split_settings sends window_s/windowing/max_windows (and seed) to the corpus reader and
    the rest to the search, with jobs renamed n_jobs (DESIGN §7 settings; DEVELOPERS.md
    contract). Common practice: unset values take the documented defaults."""
    corpus, search = split_settings({"window_s": 0.5, "windowing": "whole", "max_windows": 10,
                                     "seed": 7, "jobs": 2, "channels": 12})
    assert corpus == {"window_s": 0.5, "windowing": "whole", "max_windows": 10, "seed": 7}
    assert search["n_jobs"] == 2 and "jobs" not in search
    assert search["channels"] == 12 and search["seed"] == 7
    assert search["evaluations"] == SETTINGS_DEFAULTS["evaluations"]
    assert search["criterion"]["name"] == "renyi" and search["criterion"]["alpha"] == 3.0
    assert search["cell_area"] == [0.25, 4.0] and search["chirp"] is True


def test_nulls_mean_defaults():
    """A JSON body may carry nulls: each means the default (common practice for PATCH-like
    bodies)."""
    out = validate_settings({"channels": None, "bootstrap": None, "band_hz": None})
    assert out["channels"] == 96 and out["bootstrap"] == 8 and out["band_hz"] is None


@pytest.mark.parametrize("settings, name", [
    ({"colour": "blue"}, "colour"),
    ({"cell_area": [4, 0.25]}, "cell_area"),
    ({"cell_area": [0, 1]}, "cell_area"),
    ({"evaluations": 0}, "evaluations"),
    ({"evaluations": 2.5}, "evaluations"),
    ({"criterion": "sharpness"}, "criterion.name"),
    ({"criterion": {"name": "renyi", "beta": 1}}, "criterion"),
    ({"criterion": {"name": "renyi", "alpha": -1}}, "criterion.alpha"),
    ({"criterion": {"name": "concentration", "p": 1}}, "criterion.p"),
    ({"spacing": "mel"}, "spacing"),
    ({"channels": 1}, "channels"),
    ({"band_hz": [100, 50]}, "band_hz"),
    ({"band_hz": [100]}, "band_hz"),
    ({"chirp": "yes"}, "chirp"),
    ({"bootstrap": 1}, "bootstrap"),
    ({"jobs": 0}, "jobs"),
    ({"time_limit_s": -5}, "time_limit_s"),
])
def test_bad_settings_name_the_setting(settings, name):
    """Bad input gets a ValueError naming the setting (project rule: clear errors naming the
    field and value; common practice)."""
    with pytest.raises(ValueError) as err:
        split_settings(settings)
    assert repr(name) in str(err.value) or name in str(err.value)


def test_unknown_keys_are_all_named():
    """Every unknown key is named in one message (DESIGN §7: unknown keys are a 422 naming them)."""
    with pytest.raises(ValueError, match="'colour'.*'flavour'|'flavour'.*'colour'"):
        split_settings({"colour": 1, "flavour": 2})


def test_band_above_nyquist_is_refused_against_the_corpus_rate():
    """The band must stay below fs/2 (Nyquist–Shannon sampling theorem; common practice)."""
    with pytest.raises(ValueError, match="band_hz.*Nyquist frequency 2000 Hz"):
        resolve_search_options({"band_hz": [10, 3000]}, 4000.0, 1024)


def test_resolved_defaults_follow_the_data():
    """Data-dependent defaults are written out: band [fs/100, 0.45 fs], σ_t bounds
    [4/fs, window/6] and |β| ≤ band width / window duration (DESIGN §5)."""
    s = resolve_search_options({}, 4000.0, 1024)
    assert s["band_hz"] == [40.0, 1800.0]
    assert s["time_spread_bounds_s"] == [pytest.approx(1e-3), pytest.approx(0.256 / 6)]
    assert s["chirp_bound_hz_per_s"] == pytest.approx(1760.0 / 0.256)
    assert resolve_search_options({"chirp": False}, 4000.0, 1024)["chirp_bound_hz_per_s"] == 0.0


def test_too_short_windows_are_refused():
    """Windows under 25 samples leave no room between 4/fs and window/6 (DESIGN §5 bounds)."""
    with pytest.raises(ValueError, match="too short"):
        resolve_search_options({}, 1000.0, 20)
