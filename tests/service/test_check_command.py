"""`burstlens check` (service/commands/check.py): keep or re-tune, for an operator's cron.

The site is made up here (decaying tone bursts in red noise with a 50 Hz line, as in
tests/search/test_drift.py); `burstlens tune` tunes it once, then new files are checked. The
exit codes are the command's contract: 0 keep, 1 re-tune, 2 bad input (common practice for
cron jobs: a non-zero exit is what gets reported).
"""
import json

import numpy as np
import pytest
from burstlens.service.testing import drift_site_trace

from burstlens.service.cli import main

FS = 1000.0


def write_site(path, seed: int, f_burst_hz: float = 120.0, seconds: float = 60.0) -> str:
    """One generated trace of the drift site (burstlens.service.testing.drift_site_trace) as .npz."""
    np.savez(path, data=drift_site_trace(seed, f_burst_hz, seconds, FS),
             sampling_rate_hz=np.float64(FS))
    return str(path)


@pytest.fixture(scope="module")
def tuned(tmp_path_factory):
    """`burstlens tune` on the site (16 channels, 16 evaluations, no refinement): the folder
    with filterbank.json and diagnostics.json."""
    folder = tmp_path_factory.mktemp("tuned")
    site = write_site(folder / "tuning.npz", seed=1)
    out = folder / "out"
    assert main(["tune", site, "--out", str(out), "--channels", "16", "--evaluations", "16",
                 "--no-refine", "--bootstrap", "0", "--quiet"]) == 0
    return out


def test_same_site_exits_0_and_says_keep(tuned, tmp_path, capsys):
    """New files from the same site: exit 0 and the words say the filterbank still serves;
    the progress bars go to stderr, never stdout."""
    capsys.readouterr()
    new = write_site(tmp_path / "new.npz", seed=2)
    assert main(["check", "--filterbank", str(tuned / "filterbank.json"), new]) == 0
    captured = capsys.readouterr()
    assert captured.out.splitlines()[0] == "the filterbank still serves (keep)"
    assert "check" in captured.err


def test_moved_site_exits_1_and_json_names_it(tuned, tmp_path, capsys):
    """Bursts at 250 Hz instead of 120 Hz: exit 1; --json prints one object with the keys
    verdict, moved, scorecard, refit, figures, verdict "retune" and the dominant frequency
    among the moved (its old value read from the diagnostics.json beside the filterbank)."""
    capsys.readouterr()
    new = write_site(tmp_path / "new.npz", seed=3, f_burst_hz=250.0)
    code = main(["check", "--filterbank", str(tuned / "filterbank.json"), new, "--json", "--quiet"])
    captured = capsys.readouterr()
    assert code == 1
    answer = json.loads(captured.out)
    assert set(answer) >= {"verdict", "moved", "scorecard", "refit", "figures"}
    assert answer["verdict"] == "retune"
    assert "dominant_frequency" in [m["what"] for m in answer["moved"]]
    assert captured.err == ""


def test_bad_input_exits_2_naming_the_file(tuned, tmp_path, capsys):
    """Bad input exits 2 with a message naming what is wrong: a filterbank file that is not
    JSON, a missing data path, a diagnostics file that is not a JSON object."""
    good = str(tuned / "filterbank.json")
    new = write_site(tmp_path / "new.npz", seed=4, seconds=10.0)
    junk = tmp_path / "junk.json"
    junk.write_text("not json")
    assert main(["check", "--filterbank", str(junk), new, "--quiet"]) == 2
    assert str(junk) in capsys.readouterr().err
    missing = str(tmp_path / "nowhere.npz")
    assert main(["check", "--filterbank", good, missing, "--quiet"]) == 2
    assert missing in capsys.readouterr().err
    listed = tmp_path / "list.json"
    listed.write_text("[1, 2]")
    assert main(["check", "--filterbank", good, new, "--diagnostics", str(listed), "--quiet"]) == 2
    err = capsys.readouterr().err
    assert str(listed) in err and "JSON object" in err
