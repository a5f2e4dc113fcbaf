"""Channels and filterbanks of Gaussian kernels on the time–frequency plane.

A channel is a 2-D Gaussian kernel G(u, ν) centred on (0, f_c) that smooths the Wigner–Ville
distribution (docs/design.md §3). Its four parameters:

- ``center_hz`` f_c, Hz, 0 < f_c < fs/2;
- ``time_spread_s`` σ_t, s: the standard deviation of the kernel along time;
- ``cell_area`` a = 4π·σ_t·σ_f·√(1−ρ²), dimensionless: 1 is the Heisenberg minimum (the kernel of
  a Gaussian-window spectrogram), > 1 smooths more, < 1 super-resolves (outputs can go negative);
- ``chirp_hz_per_s`` β = ρ·σ_f/σ_t, Hz/s: the shear of the kernel, which lies along
  f′ = f_c + β·(t′ − t). β is the sweep rate df/dt of the arrivals the channel renders sharpest,
  positive for upward sweeps as read off a time–frequency plot (docs/design.md §3).

Derived (all exact, no approximation): the conditional frequency spread σ_f√(1−ρ²) = a/(4πσ_t),
σ_f² = (β·σ_t)² + (a/(4πσ_t))² and ρ = β·σ_t/σ_f (ρ has the sign of β).

The reading for people (:meth:`Channel.equivalent`) names the Gaussian spectrogram window with the
same time spread. Window convention: the window's amplitude is h(u) = exp(−u²/4σ_t²), so |h|² has
time std σ_t (``window_std_ms``); its quoted length ``window_ms`` is the full width at half maximum
of the amplitude h, 4·√(ln 2)·σ_t ≈ 3.33·σ_t; ``gaussian_std_ms`` = √2·σ_t is the ``std`` to give
``scipy.signal.windows.gaussian`` (in samples: gaussian_std_ms·fs/1000) for the same window.

A spectrogram with a Gaussian window is the WVD smoothed by the window's own WVD (L. Cohen,
Time-Frequency Analysis, 1995); its cell area is exactly 1 (de Bruijn 1967; Janssen 1984).

A filterbank also carries the site's steady lines (``steady_lines_hz``: mains hum, pumps,
fans), found in the tuning corpus: :func:`search.tfd.transform` removes them from every
window before the kernels see it (``search.noise``), so new data is transformed as the
tuning scored it.

JSON ``version`` 3 (the steady lines); version 2 files have none and load with none. Version 1
files wrote the kernel in lag coordinates u = t − t′, so their β and ρ had the opposite sign (a
channel with β matched arrivals sweeping at −β); :meth:`Filterbank.from_json` still reads them,
negating both and noting it in the provenance.
"""
from __future__ import annotations

import math
from collections.abc import Iterable, Iterator, Mapping, Sequence
from dataclasses import dataclass

import numpy as np

FORMAT = "burstlens-filterbank"
VERSION = 3
# Version 2 is version 3 without steady lines.
_NO_LINES_VERSION = 2
# Version 1 stored chirp_hz_per_s and correlation with the opposite sign (see the docstring).
_NEGATED_CHIRP_VERSION = 1
_CONVERSION_NOTE = ("Converted on load from filterbank file version 1, whose chirp_hz_per_s and "
                    "correlation had the opposite sign: both were negated, so the filterbank "
                    "sharpens the same arrivals as before.")

# |a − 1| below this reads as a plain spectrogram in :meth:`Channel.equivalent`.
SPECTROGRAM_AREA_TOLERANCE = 0.05
# Amplitude-FWHM of h(u) = exp(−u²/4σ²) in units of σ.
_FWHM_PER_STD = 4.0 * math.sqrt(math.log(2.0))
# Relative tolerance for derived fields stored in JSON (written with full repr, so tight).
_JSON_RTOL = 1e-6

_CHANNEL_FIELDS = ("center_hz", "time_spread_s", "cell_area", "chirp_hz_per_s")


def _finite(name: str, value) -> float:
    """``value`` as float, or ValueError naming the field if it is not a finite real number."""
    try:
        number = float(value)
    except (TypeError, ValueError):
        raise ValueError(f"{name}={value!r} is not a number") from None
    if isinstance(value, bool) or not math.isfinite(number):
        raise ValueError(f"{name}={value!r} is not a finite number")
    return number


def _positive(name: str, value, unit: str) -> float:
    number = _finite(name, value)
    if number <= 0.0:
        raise ValueError(f"{name}={number!r} must be > 0{unit}")
    return number


def _check_sampling_rate(sampling_rate_hz) -> float:
    return _positive("sampling_rate_hz", sampling_rate_hz, " Hz")


@dataclass(frozen=True)
class Channel:
    """One Gaussian kernel of a filterbank (see the module docstring for the parameters).

    Construction checks what needs no sampling rate (finite numbers, σ_t > 0, a > 0, f_c > 0);
    :meth:`validate` adds the Nyquist check. Fields are stored as Python floats.
    """

    center_hz: float
    time_spread_s: float
    cell_area: float = 1.0
    chirp_hz_per_s: float = 0.0  # Hz/s, sweep rate of the arrivals matched, > 0 upward

    def __post_init__(self):
        object.__setattr__(self, "center_hz", _positive("center_hz", self.center_hz, " Hz"))
        object.__setattr__(
            self, "time_spread_s", _positive("time_spread_s", self.time_spread_s, " s")
        )
        area = _finite("cell_area", self.cell_area)
        if area <= 0.0:
            raise ValueError(
                f"cell_area={area!r} must be > 0 (1 is the Heisenberg minimum of a spectrogram)"
            )
        object.__setattr__(self, "cell_area", area)
        object.__setattr__(self, "chirp_hz_per_s", _finite("chirp_hz_per_s", self.chirp_hz_per_s))

    @classmethod
    def from_spreads(
        cls, center_hz, time_spread_s, freq_spread_hz, correlation=0.0
    ) -> Channel:
        """The channel with time std σ_t, frequency std σ_f and t–f correlation ρ (|ρ| < 1).

        a = 4π·σ_t·σ_f·√(1−ρ²), β = ρ·σ_f/σ_t: ρ > 0 matches upward sweeps.
        """
        sigma_t = _positive("time_spread_s", time_spread_s, " s")
        sigma_f = _positive("freq_spread_hz", freq_spread_hz, " Hz")
        rho = _finite("correlation", correlation)
        if not abs(rho) < 1.0:
            raise ValueError(f"correlation={rho!r} must satisfy |correlation| < 1")
        area = 4.0 * math.pi * sigma_t * sigma_f * math.sqrt((1.0 - rho) * (1.0 + rho))
        return cls(center_hz, sigma_t, area, rho * sigma_f / sigma_t)

    @property
    def conditional_freq_spread_hz(self) -> float:
        """σ_f·√(1−ρ²) = a / (4π σ_t), Hz: the kernel's frequency std at fixed time offset."""
        return self.cell_area / (4.0 * math.pi * self.time_spread_s)

    @property
    def freq_spread_hz(self) -> float:
        """σ_f, Hz: the kernel's marginal frequency std, √((β σ_t)² + (a/(4π σ_t))²)."""
        return math.hypot(self.chirp_hz_per_s * self.time_spread_s, self.conditional_freq_spread_hz)

    @property
    def correlation(self) -> float:
        """ρ = β·σ_t/σ_f, the kernel's time–frequency correlation (|ρ| < 1; > 0 for upward
        sweeps, like β)."""
        return self.chirp_hz_per_s * self.time_spread_s / self.freq_spread_hz

    def validate(self, sampling_rate_hz: float) -> Channel:
        """Check the channel against a sampling rate; return it, or raise ValueError naming the
        field and value (f_c must lie strictly between 0 and the Nyquist frequency fs/2)."""
        fs = _check_sampling_rate(sampling_rate_hz)
        for name in _CHANNEL_FIELDS:
            _finite(name, getattr(self, name))
        nyquist = fs / 2.0
        if self.center_hz >= nyquist:
            raise ValueError(
                f"center_hz={self.center_hz!r} is at or above the Nyquist frequency "
                f"fs/2={nyquist!r} (sampling_rate_hz={fs!r})"
            )
        if not abs(self.correlation) < 1.0:  # only reachable through round-off extremes
            raise ValueError(f"correlation={self.correlation!r} must satisfy |correlation| < 1")
        return self

    def equivalent(self) -> dict:
        """The channel in familiar terms, a JSON-ready dict.

        - ``kind``: 'spectrogram' (|a−1| < 0.05), 'smoothed spectrogram' (a > 1) or
          'super-resolved' (a < 1);
        - ``window_ms``: FWHM of the Gaussian window amplitude h(u) = exp(−u²/4σ_t²), ms;
        - ``window_std_ms``: σ_t, the time std of |h|², ms;
        - ``gaussian_std_ms``: √2·σ_t, the ``std`` of ``scipy.signal.windows.gaussian``, ms;
        - ``super_resolution``: 1/a (> 1 is finer than any spectrogram), ``smoothing``: a;
        - ``chirp_hz_per_s``: β, Hz/s; ``matched_sweep_hz_per_s``: β too, the sweep rate df/dt
          of the arrivals this channel renders sharpest (> 0 upward); ``text``: one line for a
          report, e.g. "…, chirp +800 Hz/s (matches arrivals sweeping upward at 800 Hz/s)".
        """
        area = self.cell_area
        if abs(area - 1.0) < SPECTROGRAM_AREA_TOLERANCE:
            kind, detail = "spectrogram", ""
        elif area > 1.0:
            kind, detail = "smoothed spectrogram", f", smoothed ×{area:.1f}"
        else:
            kind, detail = "super-resolved", f", super-resolved ×{1.0 / area:.1f}"
        window_ms = _FWHM_PER_STD * self.time_spread_s * 1e3
        text = f"Gaussian spectrogram window {window_ms:.3g} ms{detail}"
        if self.chirp_hz_per_s != 0.0:
            # people read sweeps off a plot, so name the direction rather than rely on a sign
            direction = "upward" if self.chirp_hz_per_s > 0.0 else "downward"
            text += (f", chirp {_format_rate(self.chirp_hz_per_s)} Hz/s (matches arrivals "
                     f"sweeping {direction} at {_format_rate(self.chirp_hz_per_s, signed=False)}"
                     f" Hz/s)")
        return {
            "kind": kind,
            "window_ms": window_ms,
            "window_std_ms": self.time_spread_s * 1e3,
            "gaussian_std_ms": math.sqrt(2.0) * self.time_spread_s * 1e3,
            "super_resolution": 1.0 / area,
            "smoothing": area,
            "chirp_hz_per_s": self.chirp_hz_per_s,
            "matched_sweep_hz_per_s": self.chirp_hz_per_s,
            "text": text,
        }

    def to_json(self) -> dict:
        """Parameters, derived spreads and the reading for people, JSON-ready."""
        return {
            "center_hz": self.center_hz,
            "time_spread_s": self.time_spread_s,
            "freq_spread_hz": self.freq_spread_hz,
            "correlation": self.correlation,
            "cell_area": self.cell_area,
            "chirp_hz_per_s": self.chirp_hz_per_s,
            "equivalent": self.equivalent(),
        }

    def astuple(self) -> tuple[float, float, float, float]:
        """(center_hz, time_spread_s, cell_area, chirp_hz_per_s)."""
        return (self.center_hz, self.time_spread_s, self.cell_area, self.chirp_hz_per_s)


def _format_rate(rate: float, signed: bool = True) -> str:
    spec = ("+" if signed else "") + (",.0f" if abs(rate) >= 10.0 else ".2g")
    return format(rate if signed else abs(rate), spec)


class Filterbank:
    """C channels at one sampling rate, validated on construction.

    ``channels``: iterable of :class:`Channel`; ``sampling_rate_hz``: fs, Hz. ``provenance`` is an
    optional dict of facts about how the filterbank was obtained (e.g. ``window_samples``,
    ``criterion``, ``objective``) carried through :meth:`to_json` / :meth:`from_json`.
    ``steady_lines_hz``: the site's steady lines, Hz, each in (0, fs/2), removed from windows
    before the transform (module docstring). Array properties have shape (C,). Filterbanks are
    immutable, hashable and compare by value.

    Examples
    --------
    >>> from burstlens.search import Channel, Filterbank
    >>> bank = Filterbank([Channel(5.0, 0.05), Channel(20.0, 0.02, cell_area=2.0)], 100.0)
    >>> bank
    Filterbank(2 channels, sampling_rate_hz=100.0)
    >>> bank.center_hz, bank.cell_area
    (array([ 5., 20.]), array([1., 2.]))
    >>> bank[1].equivalent()["text"]
    'Gaussian spectrogram window 66.6 ms, smoothed ×2.0'
    >>> Filterbank.from_json(bank.to_json(window_samples=512)) == bank
    True
    >>> Filterbank([Channel(60.0, 0.05)], 100.0)
    Traceback (most recent call last):
    ...
    ValueError: channel 0: center_hz=60.0 is at or above the Nyquist frequency fs/2=50.0 ...
    """

    def __init__(self, channels: Iterable[Channel], sampling_rate_hz: float, *, provenance=None,
                 steady_lines_hz: Iterable[float] = ()):
        fs = _check_sampling_rate(sampling_rate_hz)
        lines = []
        for index, f in enumerate(steady_lines_hz):
            f = _finite(f"steady_lines_hz[{index}]", f)
            if not 0 < f < fs / 2:
                raise ValueError(f"steady_lines_hz[{index}]: {f!r} Hz is outside (0, fs/2) = "
                                 f"(0, {fs / 2:g}) Hz")
            lines.append(f)
        self._lines = tuple(sorted(lines))
        channels = tuple(channels)
        if not channels:
            raise ValueError("channels: a filterbank needs at least one channel")
        for index, channel in enumerate(channels):
            if not isinstance(channel, Channel):
                raise ValueError(f"channel {index}: {channel!r} is not a Channel")
            try:
                channel.validate(fs)
            except ValueError as exc:
                raise ValueError(f"channel {index}: {exc}") from None
        self._channels = channels
        self._fs = fs
        self._provenance = dict(provenance or {})
        self._arrays = np.array([c.astuple() for c in channels], dtype=np.float64)
        self._arrays.setflags(write=False)

    # -- container protocol ----------------------------------------------------------------
    @property
    def channels(self) -> tuple[Channel, ...]:
        return self._channels

    @property
    def sampling_rate_hz(self) -> float:
        return self._fs

    @property
    def provenance(self) -> dict:
        return dict(self._provenance)

    @property
    def steady_lines_hz(self) -> tuple[float, ...]:
        """The site's steady lines (Hz, ascending) removed before the transform; () for none."""
        return self._lines

    def __len__(self) -> int:
        return len(self._channels)

    def __iter__(self) -> Iterator[Channel]:
        return iter(self._channels)

    def __getitem__(self, index) -> Channel:
        return self._channels[index]

    def key(self) -> tuple:
        """Hashable value identity: (fs, ((f_c, σ_t, a, β), ...), steady lines)."""
        return (self._fs, tuple(c.astuple() for c in self._channels), self._lines)

    def __eq__(self, other) -> bool:
        return isinstance(other, Filterbank) and self.key() == other.key()

    def __hash__(self) -> int:
        return hash(self.key())

    def __repr__(self) -> str:
        return f"Filterbank({len(self)} channels, sampling_rate_hz={self._fs!r})"

    def with_channel(self, index: int, channel: Channel) -> Filterbank:
        """A copy with channel ``index`` replaced (used by per-channel refinement)."""
        channels = list(self._channels)
        channels[index] = channel
        return Filterbank(channels, self._fs, provenance=self._provenance,
                          steady_lines_hz=self._lines)

    # -- arrays (C,) -----------------------------------------------------------------------
    @property
    def center_hz(self) -> np.ndarray:
        """f_c per channel, Hz, (C,) read-only."""
        return self._arrays[:, 0]

    @property
    def time_spread_s(self) -> np.ndarray:
        """σ_t per channel, s, (C,) read-only."""
        return self._arrays[:, 1]

    @property
    def cell_area(self) -> np.ndarray:
        """a per channel (1 = Heisenberg minimum), (C,) read-only."""
        return self._arrays[:, 2]

    @property
    def chirp_hz_per_s(self) -> np.ndarray:
        """β per channel, Hz/s, (C,) read-only: the sweep rate matched, > 0 upward."""
        return self._arrays[:, 3]

    @property
    def conditional_freq_spread_hz(self) -> np.ndarray:
        """σ_f·√(1−ρ²) = a/(4πσ_t) per channel, Hz, (C,)."""
        return self.cell_area / (4.0 * np.pi * self.time_spread_s)

    @property
    def freq_spread_hz(self) -> np.ndarray:
        """σ_f per channel, Hz, (C,)."""
        return np.hypot(self.chirp_hz_per_s * self.time_spread_s, self.conditional_freq_spread_hz)

    @property
    def correlation(self) -> np.ndarray:
        """ρ per channel, (C,)."""
        return self.chirp_hz_per_s * self.time_spread_s / self.freq_spread_hz

    # -- families --------------------------------------------------------------------------
    @classmethod
    def constant_window(
        cls, centers_hz, time_spread_s, sampling_rate_hz, *, chirp_hz_per_s=0.0
    ) -> Filterbank:
        """Gaussian spectrogram: the same σ_t (s) at every centre, a = 1."""
        return cls._family(centers_hz, time_spread_s, 1.0, chirp_hz_per_s, sampling_rate_hz)

    @classmethod
    def constant_q(
        cls, centers_hz, cycles, sampling_rate_hz, *, chirp_hz_per_s=0.0
    ) -> Filterbank:
        """Constant-Q Gaussian scalogram, a = 1: σ_t = cycles / f_c, i.e. the time std of the
        window energy |h|² spans ``cycles`` periods of the centre frequency.

        A complex Morlet wavelet ``cmorB-C`` (pywt) has |ψ|² of std √B/2 in scale units, so its
        scalogram is this family with cycles = C·√B/2.
        """
        cycles = _positive("cycles", cycles, "")
        centers = _as_centers(centers_hz)
        return cls._family(centers, cycles / centers, 1.0, chirp_hz_per_s, sampling_rate_hz)

    @classmethod
    def constant_area(
        cls, centers_hz, time_spread_s, cell_area, sampling_rate_hz, *, chirp_hz_per_s=0.0
    ) -> Filterbank:
        """A chosen cell area a at every centre; σ_t (s) scalar or one per centre."""
        return cls._family(centers_hz, time_spread_s, cell_area, chirp_hz_per_s, sampling_rate_hz)

    @classmethod
    def _family(cls, centers_hz, time_spread_s, cell_area, chirp_hz_per_s, fs) -> Filterbank:
        centers = _as_centers(centers_hz)
        shape = centers.shape
        try:
            spreads, areas, chirps = (
                np.broadcast_to(np.asarray(v, dtype=np.float64), shape)
                for v in (time_spread_s, cell_area, chirp_hz_per_s)
            )
        except ValueError:
            raise ValueError(
                f"time_spread_s, cell_area and chirp_hz_per_s must be scalars or have one value "
                f"per centre ({shape[0]})"
            ) from None
        channels = []
        for index, values in enumerate(zip(centers, spreads, areas, chirps, strict=True)):
            try:
                channels.append(Channel(*(float(v) for v in values)))
            except ValueError as exc:
                raise ValueError(f"channel {index}: {exc}") from None
        return cls(channels, fs)

    # -- JSON ------------------------------------------------------------------------------
    def to_json(self, **provenance) -> dict:
        """JSON-ready dict: ``format`` "burstlens-filterbank", ``version`` 3,
        ``sampling_rate_hz``, ``steady_lines_hz``, the provenance (stored facts updated by the
        keywords, e.g. ``window_samples``, ``criterion``, ``objective``), and ``channels`` (see
        :meth:`Channel.to_json`)."""
        facts = {**self._provenance, **provenance}
        reserved = {"format", "version", "sampling_rate_hz", "channels", "steady_lines_hz"} & set(facts)
        if reserved:
            raise ValueError(f"provenance may not set reserved field(s) {sorted(reserved)}")
        return {
            "format": FORMAT,
            "version": VERSION,
            "sampling_rate_hz": self._fs,
            "steady_lines_hz": list(self._lines),
            **facts,
            "channels": [c.to_json() for c in self._channels],
        }

    @classmethod
    def from_json(cls, obj: Mapping) -> Filterbank:
        """Read :meth:`to_json` output, checking format, version and every field.

        Each channel needs ``center_hz`` and ``time_spread_s``, and either ``cell_area`` /
        ``chirp_hz_per_s`` (defaults 1 and 0) or ``freq_spread_hz`` / ``correlation``; when both
        are present they must agree. Errors name the field, e.g. ``channels[3].correlation``.

        ``version`` 3; 2 (no steady lines: loads with none); or 1: a version-1 file's
        ``chirp_hz_per_s`` and ``correlation`` are negated on load (its sign convention was the
        opposite, see the module docstring), and the provenance gets ``converted_from_version``
        = 1 and ``conversion_note`` saying so.
        """
        if not isinstance(obj, Mapping):
            raise ValueError(f"filterbank JSON must be an object, got {type(obj).__name__}")
        if obj.get("format") != FORMAT:
            raise ValueError(f"format={obj.get('format')!r} is not {FORMAT!r}")
        version = obj.get("version")
        if isinstance(version, bool) or version not in (VERSION, _NO_LINES_VERSION,
                                                         _NEGATED_CHIRP_VERSION):
            raise ValueError(
                f"version={version!r} is not supported (expected {VERSION}, {_NO_LINES_VERSION} "
                f"without steady lines, or {_NEGATED_CHIRP_VERSION}, read with chirp signs negated)"
            )
        negate = version == _NEGATED_CHIRP_VERSION
        if "sampling_rate_hz" not in obj:
            raise ValueError("sampling_rate_hz is missing")
        fs = _check_sampling_rate(obj["sampling_rate_hz"])
        items = obj.get("channels")
        if not isinstance(items, Sequence) or isinstance(items, (str, bytes)) or not items:
            raise ValueError("channels must be a non-empty list")
        channels = []
        for index, item in enumerate(items):
            where = f"channels[{index}]"
            if negate and isinstance(item, Mapping):
                item = _negate_chirp(item, where)
            channel = _channel_from_json(item, where)
            try:
                channels.append(channel.validate(fs))
            except ValueError as exc:
                raise ValueError(f"{where}.{exc}") from None
        lines = obj.get("steady_lines_hz", []) if version == VERSION else []
        if not isinstance(lines, Sequence) or isinstance(lines, (str, bytes)):
            raise ValueError(f"steady_lines_hz must be a list of frequencies (Hz), got {lines!r}")
        provenance = {
            k: v for k, v in obj.items()
            if k not in {"format", "version", "sampling_rate_hz", "channels", "steady_lines_hz"}
        }
        if negate:
            provenance["converted_from_version"] = _NEGATED_CHIRP_VERSION
            provenance["conversion_note"] = _CONVERSION_NOTE
        return cls(channels, fs, provenance=provenance, steady_lines_hz=lines)


def _negate_chirp(item: Mapping, where: str) -> dict:
    """A version-1 channel with ``chirp_hz_per_s`` and ``correlation`` (where present) negated."""
    item = dict(item)
    for name in ("chirp_hz_per_s", "correlation"):
        if name in item:
            item[name] = -_finite(f"{where}.{name}", item[name])
    return item


def _channel_from_json(item, where: str) -> Channel:
    if not isinstance(item, Mapping):
        raise ValueError(f"{where} must be an object")

    def field(name):
        return f"{where}.{name}"

    for name in ("center_hz", "time_spread_s"):
        if name not in item:
            raise ValueError(f"{field(name)} is missing")
    has_area = "cell_area" in item or "chirp_hz_per_s" in item
    has_spreads = "freq_spread_hz" in item
    try:
        if has_spreads and not has_area:
            channel = Channel.from_spreads(
                item["center_hz"], item["time_spread_s"], item["freq_spread_hz"],
                item.get("correlation", 0.0),
            )
        else:
            channel = Channel(
                item["center_hz"], item["time_spread_s"],
                item.get("cell_area", 1.0), item.get("chirp_hz_per_s", 0.0),
            )
    except ValueError as exc:
        raise ValueError(f"{where}.{exc}") from None
    if has_area:  # derived fields, when given, must agree with the parameters
        if "correlation" in item:
            rho = _finite(field("correlation"), item["correlation"])
            if not abs(rho) < 1.0:
                raise ValueError(f"{field('correlation')}={rho!r} must satisfy |correlation| < 1")
            if not math.isclose(rho, channel.correlation, rel_tol=_JSON_RTOL, abs_tol=_JSON_RTOL):
                raise ValueError(
                    f"{field('correlation')}={rho!r} disagrees with cell_area and chirp_hz_per_s "
                    f"(which give {channel.correlation!r})"
                )
        if "freq_spread_hz" in item:
            sigma_f = _finite(field("freq_spread_hz"), item["freq_spread_hz"])
            if not math.isclose(sigma_f, channel.freq_spread_hz, rel_tol=_JSON_RTOL):
                raise ValueError(
                    f"{field('freq_spread_hz')}={sigma_f!r} disagrees with time_spread_s, "
                    f"cell_area and chirp_hz_per_s (which give {channel.freq_spread_hz!r})"
                )
    return channel


def _as_centers(centers_hz) -> np.ndarray:
    centers = np.atleast_1d(np.asarray(centers_hz, dtype=np.float64))
    if centers.ndim != 1 or centers.size == 0:
        raise ValueError(f"centers_hz must be a non-empty 1-D array, got shape {centers.shape}")
    for index, value in enumerate(centers):
        _positive(f"centers_hz[{index}]", value, " Hz")
    return centers


def center_grid(band_hz, channels: int = 96, spacing: str = "log") -> np.ndarray:
    """C channel centres (Hz, shape (C,)) over ``band_hz`` = (low, high), both ends included.

    ``spacing``: 'log' (geometric, constant relative step) or 'linear'. One channel sits at the
    band's centre (geometric or arithmetic mean).
    """
    try:
        low, high = band_hz
    except (TypeError, ValueError):
        raise ValueError(f"band_hz={band_hz!r} must be a pair (low, high) in Hz") from None
    low = _positive("band_hz[0]", low, " Hz")
    high = _positive("band_hz[1]", high, " Hz")
    if not high > low:
        raise ValueError(f"band_hz={band_hz!r}: high must be above low")
    if isinstance(channels, bool) or not float(channels).is_integer() or channels < 1:
        raise ValueError(f"channels={channels!r} must be a positive integer")
    channels = int(channels)
    if spacing == "log":
        if channels == 1:
            return np.array([math.sqrt(low * high)])
        return np.geomspace(low, high, channels)
    if spacing == "linear":
        if channels == 1:
            return np.array([(low + high) / 2.0])
        return np.linspace(low, high, channels)
    raise ValueError(f"spacing={spacing!r} must be 'log' or 'linear'")
