"""search.noise: the site's steady lines found, and removed without taking the bursts with them.

Ground truth is the generating signal: sinusoids of known frequency in red noise, Gaussian
bursts of known energy.
"""
import numpy as np
import pytest
from scipy.signal import lfilter

from burstlens.search.noise import find_lines, line_basis, remove_lines, steadiness

FS, N = 2000.0, 1024
T = np.arange(N) / FS


def red_noise(m, rng, scale=0.02):
    """First-order autoregressive (red) background, the same law in every window."""
    w = lfilter([1.0], [1.0, -0.9], rng.standard_normal((m, N + 256)), axis=1)[:, 256:]
    return scale * w / w.std()


def lines(m, rng, spec):
    return sum(a * np.cos(2 * np.pi * f * T[None] + rng.uniform(0, 2 * np.pi, (m, 1)))
               for f, a in spec)


def burst(centre_s, sigma_s, f0, phase=0.0):
    u = T - centre_s
    return np.exp(-u ** 2 / (4 * sigma_s ** 2)) * np.cos(2 * np.pi * f0 * u + phase)


def test_lines_are_found_at_their_frequencies_and_nothing_else():
    """Sinusoids at known frequencies (one 60 dB above the background, one between bins) in red
    noise are found within 0.05 of a resolution bin, and nothing else is: no sidelobe of the
    strong line (Blackman–Harris sidelobes are 92 dB down: F. J. Harris, Proc. IEEE 66(1), 1978)
    and no burst (common practice: a line is narrow and steady)."""
    rng = np.random.default_rng(1)
    spec = ((50.0, 20.0), (187.37, 0.5), (430.0, 1.0))
    x = lines(40, rng, spec) + red_noise(40, rng)
    x[::3] += 3.0 * burst(0.25, 0.006, 300.0)
    found = find_lines(x, FS)
    assert len(found.lines_hz) == 3
    np.testing.assert_allclose(found.lines_hz, [f for f, _ in spec], atol=0.05 * FS / N)
    assert min(found.levels_db) > 10.0


def test_a_long_narrowband_burst_in_every_window_is_not_a_line():
    """A narrow-band burst in every window is as narrow in the median spectrum as a line, but not
    steady: its quietest quarter of the window is far below its loudest (common practice)."""
    rng = np.random.default_rng(2)
    x = np.array([burst(rng.uniform(0.2, 0.3), 0.02, 200.0, rng.uniform(0, 6.3)) for _ in range(12)])
    x += red_noise(12, rng, 0.001)
    assert steadiness(x, FS, 200.0) < 0.2
    assert find_lines(x, FS).lines_hz == ()
    steady = lines(12, rng, ((200.0, 1.0),)) + red_noise(12, rng)
    assert steadiness(steady, FS, 200.0) > 0.9


def test_removal_of_pure_lines_matches_least_squares_and_leaves_the_background():
    """Without a burst the robust fit is the ordinary least-squares fit on the same basis
    (numpy.linalg.lstsq as the reference; D. E. Butler, R. D. Russell, Geophysics 58(6), 1993,
    from memory), so lines carrying 99 % of the energy leave the background within 5 % of its
    energy (the notch at each line takes the background's own share there: 12 of 1024
    dimensions, weighted by the red spectrum), even with a line's frequency off by 0.02 bins
    (the linear terms absorb it)."""
    rng = np.random.default_rng(3)
    spec = ((60.0, 3.0), (180.0, 1.5), (301.0, 1.0))
    bg = red_noise(8, rng)
    x = lines(8, rng, spec) + bg
    off = [f + 0.02 * FS / N for f, _ in spec]
    cleaned = remove_lines(x, FS, off)
    basis = line_basis(N, FS, off)
    coef = np.linalg.lstsq(basis, x.T, rcond=None)[0]
    reference = x - (basis @ coef).T
    np.testing.assert_allclose(cleaned, reference, atol=2e-3 * np.abs(x).max())
    assert np.sum((cleaned - bg) ** 2) < 0.05 * np.sum(bg ** 2)
    assert remove_lines(x, FS, ()) is not None and np.array_equal(remove_lines(x, FS, ()), x)


def test_a_burst_at_a_line_frequency_keeps_its_energy():
    """The fit is weighted where the window is quiet (iteratively reweighted least squares:
    P. W. Holland, R. E. Welsch, Commun. Stat. 6(9), 1977), so a burst centred on a line's
    frequency keeps at least 95 % of its energy, where the plain least-squares fit takes more."""
    rng = np.random.default_rng(4)
    b = burst(0.25, 0.006, 300.0)
    x = lines(1, rng, ((300.0, 1.0),)) + red_noise(1, rng, 0.005) + b
    cleaned = remove_lines(x, FS, [300.0])[0]
    basis = line_basis(N, FS, [300.0])
    plain = x[0] - basis @ np.linalg.lstsq(basis, x[0], rcond=None)[0]
    window = slice(int(0.2 * FS), int(0.3 * FS))

    def kept(y):
        return float(np.dot(y[window], b[window]) / np.dot(b[window], b[window]))

    assert kept(cleaned) == pytest.approx(1.0, abs=0.05)
    assert kept(plain) < kept(cleaned)
