"""The invented demo site: a newly installed geophone array in a fictional deep hard-rock mine.

*Quillmoor Deep* (invented) mines a tabular reef between 2100 and 2800 m below collar. Five
three-component 14 Hz geophones on three levels (2150, 2450, 2750 m) record at 4 kHz into
network ``XX``, the code kept for test data and examples (FDSN, "FDSN Source Identifiers",
specification version 1.0), so the demo never passes for a real deployment. The record holds
microseismic events (Mw −2.5 … 0) around the active stope, two production blasts, and the
site's noise: ventilation fans, 50 Hz power-line hum with harmonics and a coloured background.
Everything here is synthetic, built from textbook physics, seeded and reproducible bit for bit.

Physics (SI units: m, s, Hz, N·m, Pa, kg/m³):

- Moment magnitude: IASPEI standard form Mw = (2/3)(log10 M0 − 9.1), M0 in N·m (IASPEI Magnitude
  Working Group, "Summary of Magnitude Working Group Recommendations on Standard Procedures for
  Determining Earthquake Magnitudes from Digital Data", 2013). Hanks & Kanamori (JGR 84, 1979)
  write (2/3)log10 M0 − 10.7 in dyne·cm, i.e. −6.03 for N·m (≈ 9.05 here); we use 9.1.
- Source: Brune ω² spectrum (Brune, JGR 75, 1970), moment rate Ṁ(t) = M0 ωc² t e^{−ωc t},
  |Ṁ(f)| = M0 / (1 + (f/fc)²). Corner frequency from the stress drop Δσ:
  r = 2.34 β / (2π fc) and Δσ = 7 M0 / (16 r³) give fc = 0.4906 β (Δσ/M0)^{1/3}; that is the
  S-wave corner. P waves use fc,P = 1.5 fc,S, the ratio of the averaged P and S corner
  frequencies of a circular crack (Madariaga, "Dynamics of an expanding circular fault",
  BSSA 66, 1976: k_P = 0.32, k_S = 0.21).
- Far-field P and S of a double couple in a homogeneous whole space (Aki & Richards, Quantitative
  Seismology, 2nd ed., 2002, ch. 4): u_P = (γ·M̂γ) γ Ṁ(t − r/α) / (4πρα³r),
  u_S = (M̂γ − (γ·M̂γ)γ) Ṁ(t − r/β) / (4πρβ³r). Underground stations: no free surface.
- Anelastic attenuation exp(−π f t*), t* = travel time / Q, with the constant-Q causal dispersion
  (phase delay −t* ln(f/f_ref)/π; Aki & Richards 2002, §5.5); hard-rock Q of a few hundred and
  Vp/Vs ≈ 1.73 (common practice).
- Coda: scattered waves after P and S with the single-scattering envelope
  A(f, t) ∝ t⁻¹ exp(−π f t / Qc) (Aki & Chouet, JGR 80, 1975), per octave band, so high
  frequencies die away first; coda energy a fixed multiple of the direct wave's (common practice).
- Guided wave: some events near the reef excite a dispersive channel wave in the low-velocity
  reef layer (Krey, "Channel waves as a tool of applied geophysics in coal mining", Geophysics
  28, 1963); modelled here as an arrival whose group velocity falls linearly with frequency, so
  low frequencies come first: an up-chirp. Its energy spreads over the layer's cylinder, so its
  amplitude falls as r^(−1/2) (geometric spreading of a 2-D wavefront; common practice), set
  equal to the S wave's scale at GUIDED_REF_DISTANCE_M.
- Sensor: velocity geophone, natural frequency 14 Hz, damping 0.7 (a second-order high-pass;
  common practice), and a digitiser anti-alias low-pass at 0.8 × Nyquist.
"""
from __future__ import annotations

import json
import os
from dataclasses import dataclass

import numpy as np

from burstlens.search.safe_io import atomic_write

DEFAULT_SEED = 20260317
SAMPLING_RATE_HZ = 4000.0
DURATION_S = 60.0
START = "2026-03-17T02:00:00"
NETWORK = "XX"
LOCATION = "00"
CHANNELS = ("GPZ", "GPN", "GPE")  # G: 1–5 kHz short period; P: geophone; Z up, N, E (SEED)

RHO = 2700.0            # kg/m³, hard rock (common practice)
VP = 6000.0             # m/s
VS = VP / 1.73          # m/s, Vp/Vs ≈ 1.73 (common practice)
QP = 400.0              # hard-rock Q of a few hundred (common practice)
QS = 250.0
QC = 300.0              # coda Q
CODA_ENERGY = {"P": 0.6, "S": 2.0}   # coda energy / direct-wave energy (common practice)
CODA_BANDS_HZ = ((60.0, 125.0), (125.0, 250.0), (250.0, 500.0), (500.0, 1000.0), (1000.0, 2000.0))
COUNTS_PER_M_S = 4.0e7  # geophone sensitivity × digitiser gain, counts per m/s
FULL_SCALE = 2 ** 23 - 1  # 24-bit digitiser

# station code -> (east, north, up) in m from the shaft collar; level = depth below collar
STATIONS = {
    "Q215A": (0.0, 0.0, -2150.0),
    "Q215B": (420.0, 160.0, -2150.0),
    "Q245A": (120.0, 380.0, -2450.0),
    "Q245B": (520.0, -140.0, -2450.0),
    "Q275A": (260.0, 120.0, -2750.0),
}
STOPE_CENTRE = np.array([260.0, 120.0, -2450.0])
STOPE_HALF_SIZE = np.array([330.0, 330.0, 280.0])
REEF_DEPTH = -2450.0   # the reef layer that carries the guided wave
REEF_HALF_THICKNESS = 60.0
P_TO_S_CORNER = 1.5     # fc,P / fc,S of a circular crack (Madariaga, BSSA 66, 1976)
GUIDED_REF_DISTANCE_M = 200.0  # where the guided wave's r^(−1/2) meets the S wave's 1/r scale
GUIDED_SWEEP_HZ = (150.0, 900.0)        # the guided wave's group velocity falls linearly ...
GUIDED_VELOCITY_FRACTION = (0.9, 0.6)   # ... from 0.9 β to 0.6 β across this band
GUIDED_CENTRE_HZ = 480.0                # Gaussian spectral weight of the guided wave: centre
GUIDED_WIDTH_HZ = 170.0                 # and standard deviation


# --- source physics -----------------------------------------------------------------------------

def moment_from_mw(mw):
    """Seismic moment M0 in N·m from moment magnitude: IASPEI standard Mw = (2/3)(log10 M0 − 9.1)
    (IASPEI Magnitude Working Group 2013, see the module docstring)."""
    return 10.0 ** (1.5 * np.asarray(mw, dtype=float) + 9.1)


def corner_frequency_hz(m0_nm, stress_drop_pa, beta_m_s):
    """Brune (1970) corner frequency fc = 0.4906·β·(Δσ/M0)^(1/3), Hz.

    From the source radius r = 2.34 β / (2π fc) and the stress drop of a circular crack
    Δσ = 7 M0 / (16 r³): fc = (2.34/2π)·(16/7)^(1/3)·β·(Δσ/M0)^(1/3) = 0.4906·β·(Δσ/M0)^(1/3).
    """
    return 0.4906 * beta_m_s * (np.asarray(stress_drop_pa, float) / np.asarray(m0_nm, float)) ** (1.0 / 3.0)


def brune_moment_rate(f_hz, m0_nm, fc_hz):
    """Complex spectrum of the Brune moment rate M0 ωc² t e^{−ωc t}: M0 / (1 + i f/fc)², N·m.

    numpy's FFT sign convention (x(t) = Σ X(f) e^{+i2πft}); its modulus is the ω² spectrum
    M0 / (1 + (f/fc)²).
    """
    return m0_nm / (1.0 + 1j * np.asarray(f_hz) / fc_hz) ** 2


def attenuation(f_hz, travel_time_s, q, f_ref_hz=1000.0):
    """Constant-Q operator: exp(−π f t*) with its causal dispersion, t* = travel time / Q.

    The phase velocity grows as 1 + ln(f/f_ref)/(πQ) (Aki & Richards 2002, §5.5), so each
    frequency arrives −t*·ln(f/f_ref)/π earlier than at f_ref; f = 0 passes unchanged. The
    velocities of the site model are those of the signal band, so f_ref = 1 kHz.
    """
    f = np.asarray(f_hz, dtype=float)
    t_star = travel_time_s / q
    log_term = np.log(np.where(f > 0, f, f_ref_hz) / f_ref_hz)
    extra_delay = -t_star * log_term / np.pi
    return np.exp(-np.pi * f * t_star) * np.exp(-2j * np.pi * f * extra_delay)


def geophone_response(f_hz, natural_hz=14.0, damping=0.7):
    """Velocity response of a moving-coil geophone, normalised to 1 well above ``natural_hz``:
    −f² / (f0² − f² + 2iζ f0 f) (a second-order high-pass; common practice)."""
    f = np.asarray(f_hz, dtype=float)
    return -(f ** 2) / (natural_hz ** 2 - f ** 2 + 2j * damping * natural_hz * f)


def antialias(f_hz, fs_hz, order=12):
    """Magnitude of the digitiser's anti-alias low-pass (Butterworth-shaped, corner 0.8 Nyquist)."""
    return 1.0 / np.sqrt(1.0 + (np.asarray(f_hz) / (0.4 * fs_hz)) ** (2 * order))


def guided_group_velocity(f_hz):
    """Group velocity (m/s) of the reef guided wave: linear in f across GUIDED_SWEEP_HZ, from
    0.9 β to 0.6 β, constant outside it."""
    return np.interp(f_hz, GUIDED_SWEEP_HZ, [GUIDED_VELOCITY_FRACTION[0] * VS, GUIDED_VELOCITY_FRACTION[1] * VS])


def guided_sweep_rate_hz_per_s(f_hz, distance_m):
    """Sweep rate df/dt (Hz/s, > 0: an up-chirp) of the guided wave at frequency f inside
    GUIDED_SWEEP_HZ, ``distance_m`` from its source.

    Frequency f arrives at its group delay t_g(f) = r / U(f) (stationary phase; common
    practice), so df/dt = 1 / (dt_g/df) = U(f)² / (−r·U′(f)), with U′ the constant slope of
    :func:`guided_group_velocity`.
    """
    (f0, f1), (u0, u1) = GUIDED_SWEEP_HZ, GUIDED_VELOCITY_FRACTION
    slope = (u1 - u0) * VS / (f1 - f0)
    return guided_group_velocity(f_hz) ** 2 / (-slope * np.asarray(distance_m, dtype=float))


def random_double_couple(rng) -> np.ndarray:
    """Unit double-couple moment tensor M̂ = n sᵀ + s nᵀ for a random fault normal n ⊥ slip s."""
    n = rng.standard_normal(3)
    n /= np.linalg.norm(n)
    s = rng.standard_normal(3)
    s -= s.dot(n) * n
    s /= np.linalg.norm(s)
    return np.outer(n, s) + np.outer(s, n)


def radiation(mt: np.ndarray, gamma: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Far-field radiation vectors (P along γ, S across it) of moment tensor ``mt`` along ray γ."""
    m_gamma = mt @ gamma
    rp = gamma.dot(m_gamma)
    return rp * gamma, m_gamma - rp * gamma


# --- the site -----------------------------------------------------------------------------------

@dataclass(frozen=True)
class Source:
    """One event or one blast charge: origin time (s from the record start), location (m),
    magnitude, stress drop (Pa), moment tensor, and whether it excites the reef guided wave."""

    kind: str
    time_s: float
    location: tuple
    mw: float
    stress_drop_pa: float
    moment_tensor: np.ndarray
    guided: bool = False

    @property
    def m0(self) -> float:
        return float(moment_from_mw(self.mw))

    @property
    def corner_hz(self) -> float:
        """S-wave (Brune) corner frequency, Hz."""
        return float(corner_frequency_hz(self.m0, self.stress_drop_pa, VS))

    @property
    def corner_p_hz(self) -> float:
        """P-wave corner frequency, Hz: P_TO_S_CORNER × the S corner (Madariaga 1976)."""
        return P_TO_S_CORNER * self.corner_hz


def _event_location(rng) -> np.ndarray:
    """A hypocentre in the stope volume between 50 and 800 m from every station."""
    coords = np.array(list(STATIONS.values()))
    while True:
        x = STOPE_CENTRE + STOPE_HALF_SIZE * rng.uniform(-1, 1, 3)
        d = np.linalg.norm(coords - x, axis=1)
        if d.min() >= 50.0 and d.max() <= 800.0:
            return x


def make_catalogue(rng, duration_s: float, n_events: int = 30, n_blasts: int = 2) -> list[Source]:
    """Events (Gutenberg–Richter b = 1 in Mw −2.5…0, Δσ log-uniform 0.1–10 MPa) and blasts."""
    sources = []
    times = np.sort(rng.uniform(1.5, duration_s - 1.5, n_events))
    for k in range(1, times.size):  # keep arrivals of neighbours apart
        times[k] = max(times[k], times[k - 1] + 0.45)
    b, lo, hi = 1.0, -2.5, 0.0
    for t in times:
        if t > duration_s - 1.0:
            break
        u = rng.uniform()
        mw = lo - np.log10(1.0 - u * (1.0 - 10 ** (-b * (hi - lo)))) / b
        stress = 10 ** rng.uniform(5.0, 7.0)
        loc = _event_location(rng)
        guided = abs(loc[2] - REEF_DEPTH) < REEF_HALF_THICKNESS or rng.uniform() < 0.2
        sources.append(Source("event", float(t), tuple(loc), float(mw), float(stress), random_double_couple(rng),
                              bool(guided)))
    # production blasts: a row of delayed charges at the development end, 25 ms apart
    for k in range(n_blasts):
        t0 = duration_s * (0.3 + 0.45 * k) + rng.uniform(-1, 1)
        centre = np.array([700.0 - 400 * k, 520.0, -2430.0 - 40 * k])
        for j in range(int(rng.integers(6, 10))):
            loc = centre + np.array([3.0 * j, 0.0, 0.0])
            # explosion: isotropic, with a little double couple (spall and block release)
            mt = np.eye(3) / np.sqrt(3.0) + 0.15 * random_double_couple(rng)
            sources.append(Source("blast", float(t0 + 0.025 * j + rng.uniform(0, 0.003)), tuple(loc),
                                  float(rng.uniform(-1.2, -0.8)), 3.0e7, mt, False))
    return sorted(sources, key=lambda s: s.time_s)


def arrivals(src: Source, station_xyz: np.ndarray, f: np.ndarray, buf_t0: float, rng) -> np.ndarray:
    """Velocity spectra (3, F) of one source at one station in a buffer starting ``buf_t0``
    (s after the origin): P, S and, for reef events, the guided wave."""
    delta = station_xyz - np.asarray(src.location)
    r = float(np.linalg.norm(delta))
    gamma = delta / r
    up, us = radiation(src.moment_tensor, gamma)
    velocity = 2j * np.pi * f  # moment rate to ground velocity: × i2πf
    source = brune_moment_rate(f, src.m0, src.corner_hz) * velocity
    source_p = brune_moment_rate(f, src.m0, src.corner_p_hz) * velocity
    out = np.zeros((3, f.size), dtype=complex)
    for phase_name, vec, v, q, spec_src in (("P", up, VP, QP, source_p), ("S", us, VS, QS, source)):
        t = r / v
        direct = spec_src * attenuation(f, t, q) / (4 * np.pi * RHO * v ** 3 * r)
        out += np.outer(vec, direct * np.exp(-2j * np.pi * f * (t - buf_t0)))
        out += _coda(rng, f, np.abs(direct) * np.linalg.norm(vec), t, t - buf_t0, CODA_ENERGY[phase_name])
    if src.guided:
        # channel wave: group velocity 0.9 β at 150 Hz falling to 0.6 β at 900 Hz (up-chirp)
        group_delay = r / guided_group_velocity(f) - buf_t0
        phase = -2 * np.pi * np.cumsum(group_delay) * (f[1] - f[0])
        band = np.exp(-0.5 * ((f - GUIDED_CENTRE_HZ) / GUIDED_WIDTH_HZ) ** 2)
        r0 = GUIDED_REF_DISTANCE_M
        strength = 0.6 * np.linalg.norm(us) * np.sqrt(r0 / max(r, 50.0))  # 2-D spreading, r^(−1/2)
        spec = (source * band * attenuation(f, r / (0.75 * VS), QS) * np.exp(1j * phase)
                / (4 * np.pi * RHO * VS ** 3 * r0))
        pol = np.array([rng.uniform(-0.3, 0.3), rng.uniform(-1, 1), rng.uniform(-1, 1)])
        out += np.outer(strength * pol / np.linalg.norm(pol), spec)
    return out


def _coda(rng, f, direct_amp, travel_s, onset_in_buf_s, energy_ratio) -> np.ndarray:
    """Spectra (3, F) of an isotropically polarised coda starting at ``onset_in_buf_s``.

    Per octave band: random-phase noise with the direct wave's amplitude spectrum, shaped in time
    by (t_onset / t)·exp(−π f_b (t − t_onset) / Qc) with t the time since origin (Aki & Chouet 1975),
    scaled so the coda energy is ``energy_ratio`` × the direct wave's energy in that band.
    """
    n = 2 * (f.size - 1)
    fs = 2 * f[-1]
    tb = np.maximum(np.arange(n) / fs - onset_in_buf_s, 0.0)    # time after the coda onset
    lo, hi = np.array(CODA_BANDS_HZ).T
    masks = (f >= lo[:, None]) & (f < hi[:, None])                  # (B, F)
    direct_energy = 2 * np.sum((direct_amp * masks) ** 2, axis=1) / n  # Parseval (irfft has the 1/n)
    centre = np.sqrt(lo * hi)
    env = travel_s / (travel_s + tb) * np.exp(-np.pi * centre[:, None] * tb / QC)  # (B, n)
    env *= np.clip((np.arange(n) / fs - onset_in_buf_s) * fs / 8.0, 0.0, 1.0)    # a short ramp, no step
    phase = np.exp(2j * np.pi * rng.uniform(size=(3, f.size)))
    noise = np.fft.irfft(direct_amp * masks[:, None, :] * phase, n=n, axis=2)    # (B, 3, n)
    shaped = noise * env[:, None, :]
    energy = np.sum(shaped ** 2, axis=(1, 2))
    gain = np.sqrt(np.divide(energy_ratio * direct_energy, energy, out=np.zeros_like(energy), where=energy > 0))
    coda = np.einsum("b,bcn->cn", gain, shaped)
    return np.fft.rfft(coda, axis=1)


def _noise(rng, n: int, fs: float, level: float, fans: list, hum_amp: float) -> np.ndarray:
    """Site noise in counts, shape (3, n): coloured background, fan lines, 50 Hz hum + harmonics."""
    t = np.arange(n) / fs
    f = np.fft.rfftfreq(n, 1.0 / fs)
    shape = (np.maximum(f, 1.0) / 100.0 + 0.05) ** -0.6 * np.abs(geophone_response(f)) * antialias(f, fs)
    shape /= np.sqrt(np.mean(shape ** 2))
    spec = (rng.standard_normal((3, f.size)) + 1j * rng.standard_normal((3, f.size))) * shape
    noise = np.fft.irfft(spec, n=n, axis=1)
    noise *= level / noise.std(axis=1, keepdims=True)
    for blade_pass_hz, amp in fans:
        # blade-pass line and two harmonics, with slow speed wander (belt slip, load)
        wander = 1.0 + 0.0015 * np.sin(2 * np.pi * t / rng.uniform(20, 40) + rng.uniform(0, 2 * np.pi))
        phase = 2 * np.pi * blade_pass_hz * np.cumsum(wander) / fs
        gains = rng.uniform(0.4, 1.0, 3)
        for h, ha in ((1, 1.0), (2, 0.45), (3, 0.2)):
            noise += np.outer(gains, amp * ha * np.sin(h * phase + rng.uniform(0, 2 * np.pi)))
    hum_phase = 2 * np.pi * 50.0 * t * (1.0 + rng.uniform(-2e-4, 2e-4))
    for h in range(1, 10):
        a = hum_amp * (1.0 if h == 1 else (0.5 if h % 2 else 0.15) / h ** 0.5)
        noise += a * np.sin(h * hum_phase + rng.uniform(0, 2 * np.pi))  # pickup: same on 3 comps
    return noise


# station -> (background rms counts, fans [(blade-pass Hz, amplitude counts)], hum amplitude)
SITE_NOISE = {
    "Q215A": (18.0, [(221.25, 30.0), (24.58, 12.0)], 22.0),
    "Q215B": (22.0, [(221.25, 14.0)], 35.0),
    "Q245A": (16.0, [(236.0, 24.0), (19.67, 8.0)], 12.0),
    "Q245B": (25.0, [(236.0, 40.0)], 18.0),
    "Q275A": (12.0, [], 9.0),
}


def generate(seed: int = DEFAULT_SEED, duration_s: float = DURATION_S):
    """The site's record: ({station: int32 array (3, n) of counts, Z/N/E}, sources)."""
    rng = np.random.default_rng(seed)
    fs = SAMPLING_RATE_HZ
    n = int(round(duration_s * fs))
    sources = make_catalogue(rng, duration_s)
    buf = 8192
    f = np.fft.rfftfreq(buf, 1.0 / fs)
    # × fs: continuous Fourier transforms (m/s per Hz) to DFT coefficients of the sampled trace
    instrument = geophone_response(f) * antialias(f, fs) * COUNTS_PER_M_S * fs
    records = {}
    for code, xyz in STATIONS.items():
        level, fans, hum = SITE_NOISE[code]
        trace = _noise(rng, n, fs, level, fans, hum)
        station = np.array(xyz)
        for src in sources:
            r = float(np.linalg.norm(station - np.asarray(src.location)))
            i0 = int(np.floor((src.time_s + r / VP - 0.05) * fs))
            buf_t0 = i0 / fs - src.time_s
            wave = np.fft.irfft(arrivals(src, station, f, buf_t0, rng) * instrument, n=buf, axis=1)
            lo, hi = max(i0, 0), min(i0 + buf, n)
            if hi > lo:
                trace[:, lo:hi] += wave[:, lo - i0: hi - i0]
        records[code] = np.clip(np.rint(trace), -FULL_SCALE, FULL_SCALE).astype(np.int32)
    return records, sources


def catalogue_json(sources: list[Source]) -> list[dict]:
    """Ground truth for the README and for checks: one dict per event or blast charge."""
    from obspy import UTCDateTime

    t0 = UTCDateTime(START)
    return [{
        "kind": s.kind,
        "origin": str(t0 + s.time_s),
        "east_m": round(s.location[0], 1), "north_m": round(s.location[1], 1), "up_m": round(s.location[2], 1),
        "mw": round(s.mw, 2),
        "stress_drop_mpa": round(s.stress_drop_pa / 1e6, 3),
        "corner_frequency_hz": round(s.corner_hz, 1),
        "guided_wave": s.guided,
    } for s in sources]


def write_demo_corpus(out_dir: str, seed: int = DEFAULT_SEED) -> list[str]:
    """Write one STEIM2 miniSEED file per station and ``catalogue.json`` into ``out_dir``.

    Each file is written to a temporary name and renamed into place, so an interrupted run never
    leaves a half-written file. Returns the paths written, sorted.
    """
    from obspy import Stream, Trace, UTCDateTime

    os.makedirs(out_dir, exist_ok=True)
    records, sources = generate(seed)
    written = []
    for code, data in records.items():
        stream = Stream()
        for channel, row in zip(CHANNELS, data, strict=True):
            tr = Trace(np.ascontiguousarray(row), header={
                "network": NETWORK, "station": code, "location": LOCATION, "channel": channel,
                "sampling_rate": SAMPLING_RATE_HZ, "starttime": UTCDateTime(START)})
            stream.append(tr)
        path = os.path.join(out_dir, f"{NETWORK}.{code}.{LOCATION}.mseed")
        atomic_write(path, lambda fh, st=stream: st.write(fh, format="MSEED", encoding="STEIM2", reclen=4096,
                                                          byteorder=">"))
        written.append(path)
    cat = os.path.join(out_dir, "catalogue.json")
    text = json.dumps({"site": "Quillmoor Deep (invented)", "seed": seed, "start": START,
                       "sources": catalogue_json(sources)}, indent=1) + "\n"
    atomic_write(cat, lambda fh: fh.write(text.encode()))
    written.append(cat)
    return sorted(written)
