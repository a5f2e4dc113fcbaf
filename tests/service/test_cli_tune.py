"""`burstlens tune` and `burstlens transform`: files written, summary, NPZ layout, exit codes."""
import json
import re

import numpy as np
import pytest
from scipy.io import wavfile

from burstlens.service.cli import main
from burstlens.service.testing import recording_client


def atoms(m, n, fs, sigma0, f0, seed=0):
    """Gaussian atoms exp(−t²/4σ0²)·cos(2π f0 t + φ) at random offsets."""
    rng = np.random.default_rng(seed)
    t = np.arange(n) / fs - n / (2 * fs)
    return np.array([np.exp(-(t - d) ** 2 / (4 * sigma0**2)) * np.cos(2 * np.pi * f0 * (t - d) + p)
                     for d, p in zip(rng.uniform(-0.02, 0.02, m), rng.uniform(0, 6.28, m), strict=True)])


def chirps(m, n, fs, beta, sigma0, f0, seed=0):
    """Linear chirps of rate β (Hz/s) under a Gaussian envelope of duration σ0."""
    rng = np.random.default_rng(seed)
    t = np.arange(n) / fs - n / (2 * fs)
    return np.array([np.exp(-(t - d) ** 2 / (4 * sigma0**2))
                     * np.cos(2 * np.pi * (f0 * (t - d) + 0.5 * beta * (t - d) ** 2) + p)
                     for d, p in zip(rng.uniform(-0.02, 0.02, m), rng.uniform(0, 6.28, m), strict=True)])

FAST = ["--windowing", "whole", "--channels", "8", "--band", "120", "360", "--evaluations", "6",
        "--bootstrap", "2"]


@pytest.fixture(scope="module")
def wav_dir(tmp_path_factory):
    """Six event files (WAV, 1 kHz, int16): Gaussian atoms and linear chirps."""
    folder = tmp_path_factory.mktemp("events")
    w = np.concatenate([atoms(3, 256, 1000.0, 0.012, 180.0, seed=1),
                        chirps(3, 256, 1000.0, 600.0, 0.04, 250.0, seed=2)])
    for i, x in enumerate(w):
        wavfile.write(folder / f"event{i}.wav", 1000, (x * 20000).astype(np.int16))
    return folder


@pytest.fixture(scope="module")
def tuned(wav_dir, tmp_path_factory):
    out = tmp_path_factory.mktemp("tuned")
    code = main(["tune", str(wav_dir), "--out", str(out), "--quiet", *FAST])
    return code, out


def test_tune_writes_the_results(tuned, capsys):
    """tune exits 0 and writes filterbank.json (format burstlens-filterbank, version 2,
    docs/design.md §8) and diagnostics.json (strict JSON with the stop reason); the filterbank reads back."""
    from burstlens.search import Filterbank

    code, out = tuned
    assert code == 0
    fb_json = json.loads((out / "filterbank.json").read_text())
    assert fb_json["format"] == "burstlens-filterbank" and fb_json["version"] == 3
    fb = Filterbank.from_json(fb_json)
    assert len(fb) == 8 and fb.sampling_rate_hz == 1000.0
    diag = json.loads((out / "diagnostics.json").read_text())
    assert diag["stop_reason"] in ("budget", "stall", "time_limit")
    assert diag["windows"]["used"] == 6 and diag["gain_bits"] is not None
    assert diag["settings"]["evaluations"] == 6 and diag["settings"]["band_hz"] == [120.0, 360.0]
    try:
        from burstlens.service.report import render_report  # noqa: F401
    except ImportError:
        return
    assert "<html" in (out / "report.html").read_text().lower()


# A line that states the sharpness gain over the best plain spectrogram, in any of the forms
# the CLI and the demo have used ("gain on windows the fit never saw: 0.16 …", "gain over the
# best spectrogram: 0.161 bits …", "; gain 0.1610 bits", "0.16 bit sharper than …").
GAIN_FORMS = re.compile(r"\bgain\b|sharper than|as sharp as|less sharp than", re.IGNORECASE)


def assert_gain_said_once(lines, diagnostics):
    """Exactly one line (warnings aside) states the gain, and no line repeats its value in the
    three- or four-decimal forms the second statement used."""
    stated = [line for line in lines if GAIN_FORMS.search(line) and not line.startswith("warning:")]
    assert len(stated) == 1, stated
    gain = diagnostics["gain_bits"]
    assert not [line for line in lines if f"{gain:.3f}" in line or f"{gain:.4f}" in line]


def test_tune_prints_a_summary(wav_dir, tmp_path, capsys):
    """The summary opens with the scorecard on held-out windows (the tuned filterbank against the
    best plain spectrogram), which states the gain, once; then names windows used, stop reason,
    objective and the channels with wide stability intervals. The progress bar's last state
    names the fit's best (the family stage's best on its subset, --no-refine) and, apart, the
    judgement: the result's objective on the held-out windows."""
    assert main(["tune", str(wav_dir), "--out", str(tmp_path), *FAST, "--no-refine"]) == 0
    shown = capsys.readouterr()
    text = shown.out
    assert text.startswith(("The tuned filterbank", "The returned spectrogram"))
    for phrase in ("windows used: 6", "stop reason:", "objective:", "wide stability intervals"):
        assert phrase in text, phrase
    diagnostics = json.loads((tmp_path / "diagnostics.json").read_text())
    assert_gain_said_once(text.splitlines(), diagnostics)
    last = shown.err.replace("\r", "\n").strip().splitlines()[-1]
    fit_best = diagnostics["family"]["best_objective_subset"]
    judged = diagnostics["judgement"]
    assert last.endswith(f"done; fit best {fit_best:.4f} bits; judged "
                         f"{judged['result']['objective']:.4f} bits on "
                         f"{judged['held_out_windows']} held-out windows"), last


def test_progress_words_keep_the_fit_best_apart_from_the_judgement():
    """While judging, the bar keeps the fit's best (the last one the fit stages reported) and
    never shows the judge stage's number, which is the result scored on other windows."""
    from burstlens.service.commands.tune import ProgressWords

    words = ProgressWords()
    msg = {"round": 3, "evaluations": 6, "budget": 6}
    assert words.during({**msg, "stage": "family", "best_objective": 4.25}).endswith(
        "family round 3, 6 of 6 evaluations; fit best 4.2500 bits")
    words.during({**msg, "stage": "refine", "best_objective": 4.2})
    during = words.during({**msg, "stage": "judge", "best_objective": 4.42})
    assert during == "judging on the held-out windows; fit best 4.2000 bits"
    assert words.after({"stop_reason": "cancelled", "judgement": None}) == \
        "stopped (cancelled), not judged; fit best 4.2000 bits"


def test_demo_summary_says_the_gain_once(tuned):
    """`make demo`'s summary (service/demo.py) leads with the scorecard and says the gain once,
    not again as "gain over the best spectrogram: … bits (objective … vs …)"."""
    from burstlens.service.demo import summary_lines

    _, out = tuned
    diagnostics = json.loads((out / "diagnostics.json").read_text())
    filterbank = json.loads((out / "filterbank.json").read_text())
    lines = summary_lines(filterbank, diagnostics, 1.0)
    assert any("stop reason" in line for line in lines)
    assert_gain_said_once(lines, diagnostics)


@pytest.mark.parametrize("extra, needle", [
    (["--cell-area", "4", "1"], "cell_area"),
    (["--band", "100", "700"], "band_hz"),
    (["--evaluations", "0"], "evaluations"),
    (["--compare-to", "box:64"], "compare_to='box:64'"),
    (["--compare-to", "hann:99999"], "compare_to='hann:99999"),
])
def test_tune_bad_settings_exit_2_naming_them(wav_dir, tmp_path, capsys, extra, needle):
    """Bad settings exit 2 with a message naming the setting (DEVELOPERS.md: 2 = bad input)."""
    code = main(["tune", str(wav_dir), "--out", str(tmp_path / "x"), "--quiet", *FAST, *extra])
    assert code == 2
    err = capsys.readouterr().err
    assert needle in err and "Traceback" not in err
    assert not (tmp_path / "x").exists()


def test_tune_missing_input_exits_2(tmp_path, capsys):
    """A path that does not exist is named in the message (project rule: name file and cause)."""
    assert main(["tune", str(tmp_path / "nothing.mseed"), "--out", str(tmp_path), "--quiet"]) == 2
    assert "nothing.mseed" in capsys.readouterr().err


def test_transform_writes_plain_npz(tuned, wav_dir, tmp_path):
    """transform writes the NPZ of docs/design.md §8 — representation (M, C, N) float32, times_s,
    center_hz and the channel table — loadable without pickles, equal to search.tfd."""
    from burstlens.search import Filterbank, read_corpus, transform

    _, out = tuned
    npz = tmp_path / "rep.npz"
    assert main(["transform", "--filterbank", str(out / "filterbank.json"), str(wav_dir),
                 "--windowing", "whole", "--out", str(npz)]) == 0
    with np.load(npz, allow_pickle=False) as data:
        arrays = {k: data[k] for k in data.files}
    assert arrays["representation"].dtype == np.float32
    assert arrays["representation"].shape == (6, 8, 256)
    assert np.allclose(arrays["times_s"], np.arange(256) / 1000.0)
    for key in ("center_hz", "time_spread_s", "freq_spread_hz", "correlation", "cell_area",
                "chirp_hz_per_s"):
        assert arrays[key].shape == (8,) and arrays[key].dtype == np.float64
    assert all(a.dtype != object for a in arrays.values())
    fb = Filterbank.from_json(json.loads((out / "filterbank.json").read_text()))
    corpus = read_corpus([str(wav_dir)], windowing="whole")
    assert np.array_equal(arrays["representation"], transform(corpus.windows, fb))


def test_transform_bad_filterbank_exits_2(wav_dir, tmp_path, capsys):
    """An unreadable or invalid filterbank file exits 2 naming the file (project rule)."""
    bad = tmp_path / "fb.json"
    bad.write_text(json.dumps({"format": "something-else"}))
    assert main(["transform", "--filterbank", str(bad), str(wav_dir), "--out",
                 str(tmp_path / "o.npz")]) == 2
    assert "fb.json" in capsys.readouterr().err


def test_judgement_flags_map_to_the_settings_the_api_accepts():
    """--held-out and --max-negative-share become held_out and max_negative_share, which
    JobSettings accepts; unset, they are left to the engine's defaults."""
    from burstlens.search.settings import SETTINGS_DEFAULTS
    from burstlens.service.cli import build_parser
    from burstlens.service.commands.options import settings_from_args, settings_json_from_args
    from burstlens.service.models import JobSettings

    args = build_parser().parse_args(["tune", "x.wav", "--out", "o", "--held-out", "0.3",
                                      "--max-negative-share", "0.02"])
    settings = settings_json_from_args(args)
    assert settings == {"held_out": 0.3, "max_negative_share": 0.02}
    assert JobSettings(**settings).to_options() == settings
    assert JobSettings(**settings).to_settings() == settings_from_args(args)
    checked = settings_from_args(args)
    assert (checked.held_out, checked.max_negative_share) == (0.3, 0.02)
    assert checked.evaluations == SETTINGS_DEFAULTS["evaluations"]
    plain = build_parser().parse_args(["submit", "x.wav", "--server", "http://127.0.0.1:1"])
    assert settings_json_from_args(plain) == {}


@pytest.mark.parametrize("flag, value", [("--held-out", "0.95"), ("--held-out", "-0.1"),
                                         ("--max-negative-share", "1.5"),
                                         ("--held-out", "nan")])
def test_judgement_flags_out_of_range_exit_2_naming_the_flag(flag, value, tmp_path, capsys):
    """A share outside its range stops before any file is read, naming the flag; the API
    refuses the same values (JobSettings)."""
    from pydantic import ValidationError

    from burstlens.service.models import JobSettings

    with pytest.raises(SystemExit) as stop:
        main(["tune", str(tmp_path), "--out", str(tmp_path / "o"), flag, value])
    assert stop.value.code == 2 and flag in capsys.readouterr().err
    with pytest.raises(ValidationError):
        JobSettings(**{flag.lstrip("-").replace("-", "_"): float(value)})


def _trigger_kind():
    """A non-default STA/LTA kind, from the reader's own list."""
    from burstlens.search.corpus.ingest import DEFAULT_TRIGGER, TRIGGERS

    return next(kind for kind in TRIGGERS if kind != DEFAULT_TRIGGER)


@pytest.fixture(scope="module")
def burst_dir(tmp_path_factory):
    """Two 12-s traces (.npz, 1 kHz) of tone bursts in noise, for burst windowing."""
    from burstlens.service.testing import burst_npz

    folder = tmp_path_factory.mktemp("bursts")
    for i in range(2):
        (folder / f"trace{i}.npz").write_bytes(burst_npz(seed=i))
    return folder


def test_tune_takes_every_corpus_option_and_the_corpus_reflects_them(burst_dir, tmp_path):
    """tune passes the corpus flags (the same as inspect's) to the corpus reader: the corpus in
    diagnostics.json records the values used, and under defaults.given which ones were given
    rather than chosen from the data (docs/design.md §6: every default the run chose is written)."""
    kind = _trigger_kind()
    out = tmp_path / "out"
    assert main(["tune", str(burst_dir), "--out", str(out), "--quiet", "--channels", "6",
                 "--evaluations", "4", "--bootstrap", "0", "--no-refine",
                 "--sta-s", "0.02", "--lta-s", "0.5", "--trigger-on", "3", "--trigger-off", "1.2",
                 "--trigger", kind, "--pre-trigger", "0.2", "--window-s", "0.256",
                 "--bandpass", "20", "400", "--max-windows", "50", "--seed", "4"]) == 0
    defaults = json.loads((out / "diagnostics.json").read_text())["corpus"]["defaults"]
    given = {"sta_s": 0.02, "lta_s": 0.5, "trigger_on": 3.0, "trigger_off": 1.2, "trigger": kind,
             "pre_trigger": 0.2, "window_s": 0.256, "bandpass_hz": [20.0, 400.0],
             "max_windows": 50, "seed": 4}
    assert defaults["given"] == given
    for key, value in given.items():
        assert defaults[key] == value, key
    assert defaults["sta_source"] == defaults["lta_source"] == defaults["window_source"] == "given"


@pytest.mark.parametrize("extra, needle", [
    (["--trigger-on", "1.2"], "trigger_off"),          # below the default off threshold 1.5
    (["--pre-trigger", "1"], "pre_trigger"),
    (["--sta-s", "0.5", "--lta-s", "0.2"], "sta_s"),
    (["--components", "Z?"], "components"),
    (["--bandpass", "300", "100"], "bandpass_hz"),
    (["--hop-s", "0"], "hop_s"),
])
def test_bad_corpus_options_exit_2_naming_the_setting(wav_dir, tmp_path, capsys, extra, needle):
    """tune and inspect refuse a bad corpus option with exit 2 and the setting's name, before any
    file is read (project rule: clear errors naming the field and value)."""
    for argv in (["tune", str(wav_dir), "--out", str(tmp_path / "x"), "--quiet"], ["inspect",
                                                                                   str(wav_dir)]):
        assert main([*argv, *extra]) == 2
        err = capsys.readouterr().err
        assert needle in err and "Traceback" not in err
    assert not (tmp_path / "x").exists()


def test_inspect_tune_and_submit_share_the_corpus_flags():
    """The three entry points take the same corpus flags and give the same settings, named as
    the job settings of POST /v1/jobs, which JobSettings accepts unchanged."""
    from burstlens.search.settings import CORPUS_OPTIONS
    from burstlens.service.cli import build_parser
    from burstlens.service.commands.options import settings_json_from_args
    from burstlens.service.models import JobSettings

    kind = _trigger_kind()
    flags = ["--sta-s", "0.02", "--lta-s", "0.5", "--trigger-on", "3", "--trigger-off", "1.2",
             "--pre-trigger", "0.2", "--trigger", kind, "--components", "Z", "--bandpass", "1",
             "40", "--sampling-rate", "100", "--csv-sampling-rate", "200", "--hop-s", "1",
             "--windowing", "sliding", "--window-s", "2", "--max-windows", "9", "--seed", "5"]
    heads = (["inspect", "x.wav"], ["tune", "x.wav", "--out", "o"],
             ["submit", "x.wav", "--server", "http://127.0.0.1:1"])
    found = [settings_json_from_args(build_parser().parse_args([*head, *flags])) for head in heads]
    assert found[0] == found[1] == found[2]
    assert set(found[0]) == set(CORPUS_OPTIONS)
    assert found[0]["bandpass_hz"] == [1.0, 40.0] and found[0]["trigger"] == kind
    assert JobSettings(**found[0]).to_options() == found[0]


def test_job_flags_set_the_engines_settings_with_its_choices():
    """Every job-settings flag sets a setting ``search.settings`` knows (a key of
    SETTINGS_DEFAULTS, or a field of the criterion), offers exactly its choice list, and all of
    them given at once make settings that ``JobSettings.from_mapping`` accepts, under the same
    names; inspect has none of them. Source: DEVELOPERS.md (one definition of each option set,
    one CLI declaration)."""
    from burstlens.search.criteria_options import CRITERIA, CRITERION_DEFAULTS
    from burstlens.search.settings import SETTINGS_DEFAULTS, SPACINGS
    from burstlens.service.cli import build_parser
    from burstlens.service.commands.options import JOB_FLAGS, settings_from_args, settings_json_from_args

    for flag in JOB_FLAGS:
        group, _, name = flag.setting.rpartition(".")
        assert name in (CRITERION_DEFAULTS if group == "criterion" else SETTINGS_DEFAULTS), flag
    parser = build_parser()
    head = ["tune", "x.wav", "--out", "o"]
    for flag, choices in (("--spacing", SPACINGS), ("--criterion", CRITERIA)):
        for value in choices:
            parser.parse_args([*head, flag, value])
        with pytest.raises(SystemExit):
            parser.parse_args([*head, flag, "none-of-them"])
    argv = [*head, "--channels", "12", "--band", "5", "40", "--spacing", SPACINGS[-1],
            "--criterion", CRITERIA[-1], "--alpha", "2", "--cell-area", "0.5", "2",
            "--no-chirp", "--no-refine", "--no-guard", "--evaluations", "3", "--time-limit", "9",
            "--bootstrap", "0", "--held-out", "0.2", "--max-negative-share", "0.05", "--jobs", "2",
            "--compare-to", "hann:8:4"]
    settings = settings_json_from_args(parser.parse_args(argv))
    assert set(settings) == {flag.setting.split(".")[0] for flag in JOB_FLAGS}
    checked = settings_from_args(parser.parse_args(argv)).as_dict()
    assert {k: checked[k] for k in settings if k != "criterion"} == {
        k: v for k, v in settings.items() if k != "criterion"}
    assert checked["criterion"]["name"] == CRITERIA[-1] and checked["criterion"]["alpha"] == 2.0
    seeded = parser.parse_args(["inspect", "x.wav", "--seed", "3"])
    assert settings_json_from_args(seeded) == {"seed": 3}
    assert settings_from_args(seeded).read_options() == {"seed": 3}


def test_submit_sends_the_corpus_options_with_the_upload_and_the_job(wav_dir, monkeypatch,
                                                                     capsys):
    """submit reads no corpus itself: the upload check reads the corpus with the corpus options
    (so it finds the windows the job will), and the job's settings carry them too."""
    from burstlens.service.commands import submit

    calls = {}
    monkeypatch.setattr(submit, "Client", recording_client(calls))
    assert main(["submit", str(wav_dir), "--server", "http://127.0.0.1:1", "--windowing", "whole",
                 "--components", "z", "--channels", "8"]) == 0
    assert calls["upload"] == {"windowing": "whole", "components": "Z"}
    assert calls["job"] == {"windowing": "whole", "components": "z", "channels": 8}
    assert main(["submit", str(wav_dir), "--server", "http://127.0.0.1:1",
                 "--trigger-on", "-1"]) == 2
    assert "trigger_on" in capsys.readouterr().err
