"""Job settings: defaults, the corpus/search split, and errors that name the setting."""
import pytest

from burstlens.search.settings import SETTINGS_DEFAULTS, JobSettings, split_settings


def test_split_routes_every_key_and_fills_defaults():
    """split_settings sends the corpus options given (here window_s/windowing/max_windows/seed)
    to the corpus reader and the rest to the search, each under its one name, jobs included
    (docs/design.md §7 settings; DEVELOPERS.md contract). Common practice: unset values take the
    documented defaults."""
    corpus, search = split_settings({"window_s": 0.5, "windowing": "whole", "max_windows": 10,
                                     "seed": 7, "jobs": 2, "channels": 12})
    assert corpus == {"window_s": 0.5, "windowing": "whole", "max_windows": 10, "seed": 7}
    assert search["jobs"] == 2 and "n_jobs" not in search
    assert search["channels"] == 12 and search["seed"] == 7
    assert search["evaluations"] == SETTINGS_DEFAULTS["evaluations"]
    assert search["criterion"]["name"] == "renyi" and search["criterion"]["alpha"] == 3.0
    assert search["cell_area"] == [0.25, 4.0] and search["chirp"] is True


def test_nulls_mean_defaults():
    """A JSON body may carry nulls: each means the default (common practice for PATCH-like
    bodies)."""
    out = JobSettings.from_mapping({"channels": None, "bootstrap": None, "band_hz": None})
    assert out == JobSettings()
    assert out.channels == 96 and out.bootstrap == 8 and out.band_hz is None


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
    """Every unknown key is named in one message (docs/design.md §7: unknown keys are a 422 naming them)."""
    with pytest.raises(ValueError, match="'colour'.*'flavour'|'flavour'.*'colour'"):
        split_settings({"colour": 1, "flavour": 2})


def test_band_above_nyquist_is_refused_against_the_corpus_rate():
    """The band must stay below fs/2 (Nyquist–Shannon sampling theorem; common practice)."""
    with pytest.raises(ValueError, match="band_hz.*Nyquist frequency 2000 Hz"):
        JobSettings(band_hz=(10, 3000)).resolve(4000.0, 1024)


def test_resolved_defaults_follow_the_data():
    """Data-dependent defaults are written out: band [fs/100, 0.45 fs], σ_t bounds
    [4/fs, window/6] and |β| ≤ band width / window duration (docs/design.md §5)."""
    s = JobSettings().resolve(4000.0, 1024)
    assert s["band_hz"] == [40.0, 1800.0]
    assert s["time_spread_bounds_s"] == [pytest.approx(1e-3), pytest.approx(0.256 / 6)]
    assert s["chirp_bound_hz_per_s"] == pytest.approx(1760.0 / 0.256)
    assert JobSettings(chirp=False).resolve(4000.0, 1024)["chirp_bound_hz_per_s"] == 0.0


def test_too_short_windows_are_refused():
    """Windows under 25 samples leave no room between 4/fs and window/6 (docs/design.md §5 bounds)."""
    with pytest.raises(ValueError, match="too short"):
        JobSettings().resolve(1000.0, 20)


def test_every_corpus_option_is_a_setting_for_read_corpus():
    """The corpus options are exactly read_corpus's keywords (docs/design.md §6, §9: the settings mirror
    the reader), each a job setting that split_settings hands to the reader, and only when set:
    the reader's own defaults stay in force otherwise."""
    import inspect

    from burstlens.search.corpus import read_corpus
    from burstlens.search.settings import CORPUS_KEYS, CORPUS_OPTIONS

    # `progress` (the caller's callback) and `mapper` (where the tasks run) are not reading
    # choices, so they are no corpus options
    keywords = [p.name for p in inspect.signature(read_corpus).parameters.values()
                if p.kind is inspect.Parameter.KEYWORD_ONLY and p.name not in ("progress", "mapper")]
    assert list(inspect.signature(read_corpus).parameters)[-2:] == ["progress", "mapper"]
    assert list(CORPUS_OPTIONS) == list(CORPUS_KEYS) == keywords
    assert set(CORPUS_KEYS) <= set(SETTINGS_DEFAULTS)
    given = {"sta_s": 0.02, "lta_s": 0.4, "trigger_on": 4, "trigger_off": 1.2, "pre_trigger": 0.1,
             "components": "zn", "bandpass_hz": [0, 200], "sampling_rate_hz": 1000,
             "csv_sampling_rate_hz": 500, "hop_s": 0.1, "windowing": "sliding", "window_s": 0.5,
             "max_windows": 20, "seed": 3}
    corpus, search = split_settings({**given, "channels": 8})
    assert corpus == {**given, "trigger_on": 4.0, "components": "ZN", "bandpass_hz": [0.0, 200.0],
                      "sampling_rate_hz": 1000.0, "csv_sampling_rate_hz": 500.0}
    assert "sta_s" not in search and search["seed"] == 3
    assert split_settings({"channels": 8})[0] == {}


def test_trigger_kinds_are_the_readers():
    """The STA/LTA kinds accepted are the reader's TRIGGERS, whatever their names, and the
    default shown is the reader's DEFAULT_TRIGGER."""
    from burstlens.search.corpus.ingest import DEFAULT_TRIGGER, TRIGGERS
    from burstlens.search.settings import CORPUS_OPTIONS

    option = CORPUS_OPTIONS["trigger"]
    assert option.choices == tuple(TRIGGERS) and option.default_text() == DEFAULT_TRIGGER
    for kind in TRIGGERS:
        assert split_settings({"trigger": kind})[0] == {"trigger": kind}


@pytest.mark.parametrize("settings, name", [
    ({"windowing": "events"}, "windowing"),
    ({"window_s": 0}, "window_s"),
    ({"window_s": 61}, "window_s"),
    ({"max_windows": 0}, "max_windows"),
    ({"max_windows": 2.5}, "max_windows"),
    ({"seed": -1}, "seed"),
    ({"sampling_rate_hz": -100}, "sampling_rate_hz"),
    ({"components": "Z?"}, "components"),
    ({"components": ""}, "components"),
    ({"bandpass_hz": [10]}, "bandpass_hz"),
    ({"bandpass_hz": [200, 100]}, "bandpass_hz"),
    ({"bandpass_hz": [-1, 100]}, "bandpass_hz"),
    ({"csv_sampling_rate_hz": float("inf")}, "csv_sampling_rate_hz"),
    ({"sta_s": float("nan")}, "sta_s"),
    ({"lta_s": "long"}, "lta_s"),
    ({"trigger_on": 0}, "trigger_on"),
    ({"trigger_off": -1}, "trigger_off"),
    ({"trigger_on": 1.2}, "trigger_off"),            # below the reader's default off threshold
    ({"trigger_on": 2, "trigger_off": 3}, "trigger_off"),
    ({"sta_s": 0.5, "lta_s": 0.5}, "sta_s"),
    ({"pre_trigger": 1}, "pre_trigger"),
    ({"pre_trigger": -0.1}, "pre_trigger"),
    ({"trigger": "fastest"}, "trigger"),
    ({"hop_s": 0}, "hop_s"),
])
def test_bad_corpus_options_name_the_setting(settings, name):
    """Each corpus option is checked once, in search.settings, with a ValueError naming it; the
    reader's own limits (Trnkoczy, NMSOP-2 IS 8.1, 2012: the off threshold below the on one;
    common practice: STA shorter than LTA, a pre-trigger share below 1)."""
    with pytest.raises(ValueError) as err:
        split_settings(settings)
    assert f"setting {name!r}" in str(err.value)


def test_upload_text_parses_to_the_same_values():
    """Form-field text (the upload's corpus options) parses to the values the JSON settings
    give; a band is LO,HI or [LO, HI] (common practice)."""
    from burstlens.search.settings import CORPUS_OPTIONS, check_corpus_options

    text = {"sta_s": "0.02", "max_windows": "20", "bandpass_hz": "[1, 40]", "trigger_on": " 4 ",
            "components": "z"}
    parsed = check_corpus_options({k: CORPUS_OPTIONS[k].parse(v) for k, v in text.items()})
    assert parsed == {"sta_s": 0.02, "max_windows": 20, "bandpass_hz": [1.0, 40.0],
                      "trigger_on": 4.0, "components": "Z"}
    assert CORPUS_OPTIONS["bandpass_hz"].parse("1,40") == [1.0, 40.0]
    with pytest.raises(ValueError, match="'max_windows'"):
        CORPUS_OPTIONS["max_windows"].parse("many")


def test_settings_are_frozen_and_checked_however_made():
    """A JobSettings is immutable, and made directly (not through from_mapping) its values are
    checked by the same code, with the same message naming the setting (project rule: one
    check per setting); replace() checks again."""
    import dataclasses

    settings = JobSettings(jobs=2)
    with pytest.raises(dataclasses.FrozenInstanceError):
        settings.jobs = 3
    with pytest.raises(ValueError, match="setting 'channels' = 1: must be at least 2"):
        JobSettings(channels=1)
    with pytest.raises(ValueError, match="setting 'jobs' = 0"):
        settings.replace(jobs=0)
    assert settings.replace(jobs=-1).jobs == -1 and settings.jobs == 2


def test_defaults_are_written_once():
    """SETTINGS_DEFAULTS, FilterbankSearch's keyword defaults and JobSettings() are one source:
    every search setting's default is the dataclass field's (DEVELOPERS.md: one definition)."""
    import inspect

    from burstlens.search.optimize import FilterbankSearch
    from burstlens.search.settings import SEARCH_KEYS

    defaults = JobSettings().as_dict()
    assert defaults == SETTINGS_DEFAULTS
    parameters = inspect.signature(FilterbankSearch).parameters
    for key in SEARCH_KEYS:
        if key == "criterion":  # None: the default criterion
            assert parameters[key].default is None
            continue
        value = parameters[key].default
        assert (list(value) if isinstance(value, tuple) else value) == defaults[key], key


def test_the_record_keeps_every_setting_in_order():
    """resolve() records every setting in the order of SETTINGS_DEFAULTS, then the derived
    bounds (docs/design.md §8: the record of a run lists every setting and default it used);
    the corpus options given stay the reader's, not the search's."""
    record = JobSettings.from_mapping({"seed": 3, "max_windows": 9, "jobs": 2}).resolve(1000.0, 256)
    assert list(record)[:len(SETTINGS_DEFAULTS)] == list(SETTINGS_DEFAULTS)
    assert record["seed"] == 3 and record["jobs"] == 2 and record["max_windows"] == 9
    assert record["window_s"] == 0.256 and record["nyquist_hz"] == 500.0


def test_the_readers_defaults_are_its_read_options():
    """The corpus options' defaults (CLI help, API documents, the trigger pair check) are the
    reader's own ReadOptions, which read_corpus fills in for every option not given; the
    thresholds are Trnkoczy's (NMSOP-2 IS 8.1, 2012: trigger on 3–4, off 1–1.5 for local
    events)."""
    from dataclasses import fields

    from burstlens.search.corpus.ingest import ReadOptions
    from burstlens.search.settings import CORPUS_OPTIONS

    assert [f.name for f in fields(ReadOptions)] == list(CORPUS_OPTIONS)
    for option in CORPUS_OPTIONS.values():
        if option.reader_default:
            assert option.default == getattr(ReadOptions(), option.name), option.name
    filled = ReadOptions.checked(trigger_on=4, components="zn")
    assert filled == ReadOptions(trigger_on=4.0, components="ZN")
    assert 3 <= filled.trigger_on <= 4 and 1 <= ReadOptions().trigger_off <= 1.5
