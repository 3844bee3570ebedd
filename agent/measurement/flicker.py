"""Flickermeter after IEC 61000-4-15 Ed.2: Pinst, Pst (10 min) and Plt (2 h) per channel.

The chain, per channel::

    v [V] ─▶ squaring demodulator v² ─▶ mean of D samples (decimation to about 480 S/s)
      ─▶ input adaptor: divide by the mean square, first-order smoothed (τ 60 s)
      ─▶ high-pass 0.05 Hz (1st order) ─▶ low-pass 35 Hz (6th-order Butterworth: removes the
         2 f0 carrier) ─▶ lamp-eye weighting filter (230 V or 120 V lamp)
      ─▶ squaring ─▶ first-order smoothing (τ 0.3 s) ─▶ × k = Pinst
      ─▶ statistical classifier over 10 min ─▶ Pst;  12 Pst ─▶ Plt (cubic mean)

Squaring before the decimation keeps the demodulation exact; the D-sample mean is a boxcar
whose response at 35 Hz is > 0.99 at 480 S/s. Every linear stage is a cascade of biquads
(analog prototype, bilinear transform) run in fixed chunks of the decimated signal as one
state-space block product (``y = T x + O s``), so the recursion runs inside numpy's matrix
product rather than a Python loop, scipy is not needed at the edge, and any block split of
the input gives the same values (chunks are anchored to the sample index). The two one-pole
smoothers (input adaptor, block 4) keep only every 8th output, so they run as a recursion
over those (:class:`DecimatedFirstOrder`).

The gain k makes an 8.8 Hz sinusoidal fluctuation of ΔV/V = 0.25 % (peak to peak, 230 V
lamp) give Pinst = 1 on average (from memory); the check against the standard's Table 5
(rectangular modulation, Pst = 1 ± 5 %, ``tests/SOURCES.md``) is in
``tests/test_measurement_flicker.py``. The classifier takes exact percentiles of Pinst
sampled at about 60 S/s (the limit of a fine class classifier).

References
----------
IEC 61000-4-15 Ed.2 (2010): clause 4 (blocks 1-5), weighting-filter parameters (from memory),
Pst formula and smoothed percentiles (published), Plt (from memory).
"""

from __future__ import annotations

import math
from collections.abc import Callable
from dataclasses import dataclass, field

import numpy as np
import numpy.typing as npt

F64 = npt.NDArray[np.float64]

DECIMATED_RATE = 480.0          # [S/s] target rate after the D-sample mean
CHUNK = 480                     # decimated samples per state-space block (1 s at 480 S/s)
PINST_STEP = 8                  # keep every 8th Pinst value for the classifier (60 S/s)
MAIN_SUBBLOCKS = 4              # the weighting chain runs a chunk as 4 sub-blocks at once
ADAPTOR_TAU_S = 60.0            # input adaptor smoothing [s] (from memory: 1 min)
SMOOTHING_TAU_S = 0.3           # block 4 first-order smoothing [s] (published)
SETTLE_S = 60.0                 # after a start or a reset, values are flagged as settling
# 8.8 Hz sinusoid, ΔV/V = 0.25 % peak to peak (relative amplitude a = 0.125 %) gives
# Pinst = 1: the demodulated fluctuation 2a sin(ωt) has mean square 2a² (from memory).
PINST_GAIN = 1.0 / (2.0 * 0.00125**2)

#: Weighting filter parameters per lamp: K, λ, ω1, ω2, ω3, ω4 with λ and ω as 2π × [Hz]
#: (IEC 61000-4-15 Ed.2; from memory).
LAMPS: dict[str, tuple[float, float, float, float, float, float]] = {
    "230V": (1.74802, 4.05981, 9.15494, 2.27979, 1.22535, 21.9),
    "120V": (1.6357, 4.167375, 9.077169, 2.939902, 1.394468, 17.31512),
}

#: Pst weights and the smoothed percentiles they apply to (IEC 61000-4-15, published).
PST_TERMS: tuple[tuple[float, tuple[float, ...]], ...] = (
    (0.0314, (0.1,)),
    (0.0525, (0.7, 1.0, 1.5)),
    (0.0657, (2.2, 3.0, 4.0)),
    (0.28, (6.0, 8.0, 10.0, 13.0, 17.0)),
    (0.08, (30.0, 50.0, 80.0)),
)


# ---------------------------------------------------------------------------- filter design
def analog_sections(lamp: str, nominal_hz: float = 50.0, prewarp_fs: float | None = None
                    ) -> list[tuple[F64, F64]]:
    """The analog prototype of blocks 3 (high-pass 0.05 Hz, low-pass 35 Hz) and the lamp's
    weighting filter as sections ``(b, a)`` of s-polynomials (highest power first).

    References
    ----------
    IEC 61000-4-15 Ed.2 clause 4.3 (block 3); weighting filter
    K ω1 s / (s² + 2 λ s + ω1²) · (1 + s/ω2) / ((1 + s/ω3)(1 + s/ω4)).
    """
    if lamp not in LAMPS:
        raise ValueError(f"lamp must be one of {', '.join(LAMPS)}, got {lamp!r}")
    k, lam, w1, w2, w3, w4 = LAMPS[lamp]
    tau = 2 * math.pi

    def warp(w: float) -> float:
        """Pre-warp a corner [rad/s] so the bilinear transform at prewarp_fs keeps it."""
        if prewarp_fs is None:
            return w
        return 2.0 * prewarp_fs * math.tan(w / (2.0 * prewarp_fs))

    w1p = warp(w1 * tau)
    lam = lam * tau * (w1p / (w1 * tau))        # the resonance keeps its damping ratio
    w1, w2, w3, w4 = w1p, warp(w2 * tau), warp(w3 * tau), warp(w4 * tau)
    out: list[tuple[F64, F64]] = []
    wh = warp(tau * 0.05)
    out.append((np.array([1.0, 0.0]), np.array([1.0, wh])))          # s / (s + ωh)
    wc = warp(tau * carrier_cutoff_hz(nominal_hz))
    n = 6
    for i in range(n // 2):                                          # Butterworth pairs
        theta = math.pi * (2 * i + n + 1) / (2 * n)
        re = wc * math.cos(theta)
        out.append((np.array([0.0, 0.0, wc * wc]), np.array([1.0, -2.0 * re, wc * wc])))
    out.append((np.array([0.0, k * w1, 0.0]), np.array([1.0, 2.0 * lam, w1 * w1])))
    # (1 + s/ω2) / ((1 + s/ω3)(1 + s/ω4))
    out.append((np.array([0.0, 1.0 / w2, 1.0]),
                np.array([1.0 / (w3 * w4), 1.0 / w3 + 1.0 / w4, 1.0])))
    return out


def carrier_cutoff_hz(nominal_hz: float) -> float:
    """Block 3 low-pass cut-off: 35 Hz on 50 Hz systems, 42 Hz on 60 Hz (from memory)."""
    return 42.0 if nominal_hz > 55.0 else 35.0


def bilinear(b: F64, a: F64, fs: float) -> tuple[F64, F64]:
    """Bilinear transform s = 2 fs (z - 1)/(z + 1) of one section (order ≤ 2), normalised
    so that a[0] = 1; coefficients in powers of z⁻¹."""
    order = max(len(a), len(b)) - 1
    b = np.concatenate([np.zeros(order + 1 - len(b)), b])
    a = np.concatenate([np.zeros(order + 1 - len(a)), a])
    c = 2.0 * fs
    zm1 = np.poly1d([1.0, -1.0])
    zp1 = np.poly1d([1.0, 1.0])
    num = np.poly1d([0.0])
    den = np.poly1d([0.0])
    for i in range(order + 1):                 # coefficient of s^(order - i)
        p = order - i
        term = (c ** p) * zm1 ** p * zp1 ** (order - p)
        num = num + b[i] * term
        den = den + a[i] * term
    bn = np.asarray(num.coeffs, float)
    an = np.asarray(den.coeffs, float)
    bn = np.concatenate([np.zeros(order + 1 - len(bn)), bn])
    an = np.concatenate([np.zeros(order + 1 - len(an)), an])
    return bn / an[0], an / an[0]


def first_order_lowpass(tau_s: float, fs: float) -> tuple[F64, F64]:
    """1 / (1 + s τ) by the bilinear transform."""
    return bilinear(np.array([0.0, 1.0]), np.array([tau_s, 1.0]), fs)


def digital_sections(lamp: str, fs: float, nominal_hz: float = 50.0) -> list[tuple[F64, F64]]:
    """Block 3 and the weighting filter as digital sections at ``fs`` [S/s] (bilinear
    transform, every corner frequency pre-warped)."""
    return [bilinear(b, a, fs) for b, a in analog_sections(lamp, nominal_hz, fs)]


# ---------------------------------------------------------------------------- state space
@dataclass(frozen=True)
class StateSpace:
    a: F64
    b: F64
    c: F64
    d: float


def section_state_space(b: F64, a: F64) -> StateSpace:
    """Transposed direct form II of one digital section (order 1 or 2)."""
    n = len(a) - 1
    if n == 0:
        return StateSpace(np.zeros((0, 0)), np.zeros(0), np.zeros(0), float(b[0]))
    am = np.zeros((n, n))
    am[:, 0] = -a[1:]
    am[:-1, 1:] = np.eye(n - 1)
    bm = b[1:] - a[1:] * b[0]
    cm = np.zeros(n)
    cm[0] = 1.0
    return StateSpace(am, bm, cm, float(b[0]))


def series(first: StateSpace, second: StateSpace) -> StateSpace:
    """``second`` after ``first``."""
    n1, n2 = first.a.shape[0], second.a.shape[0]
    a = np.zeros((n1 + n2, n1 + n2))
    a[:n1, :n1] = first.a
    a[n1:, :n1] = np.outer(second.b, first.c)
    a[n1:, n1:] = second.a
    b = np.concatenate([first.b, second.b * first.d])
    c = np.concatenate([second.d * first.c, second.c])
    return StateSpace(a, b, c, second.d * first.d)


def cascade(sections: list[tuple[F64, F64]]) -> StateSpace:
    ss = section_state_space(*sections[0])
    for b, a in sections[1:]:
        ss = series(ss, section_state_space(b, a))
    return ss


@dataclass(frozen=True)
class BlockFilter:
    """A linear filter run ``length`` samples at a time: ``y = T x + O s``, ``s' = P s + Q x``
    for every column of x (channels), exactly the recursion's values up to rounding."""

    t: F64
    o: F64
    p: F64
    q: F64

    @classmethod
    def build(cls, ss: StateSpace, length: int, every: int = 1) -> BlockFilter:
        """Block matrices for chunks of ``length`` samples; ``every`` > 1 keeps only every
        so many outputs (rows 0, every, 2 every, ...): a cheaper product when the caller
        samples the output anyway."""
        n = ss.a.shape[0]
        o = np.zeros((length, n))
        h = np.zeros(length)
        h[0] = ss.d
        ak = np.eye(n)
        cols = np.zeros((n, length))
        for i in range(length):
            o[i] = ss.c @ ak
            if i:
                h[i] = o[i - 1] @ ss.b
            ak = ss.a @ ak
        idx = np.arange(length)
        t = np.where(idx[:, None] >= idx[None, :], h[np.abs(idx[:, None] - idx[None, :])], 0.0)
        t, o = np.ascontiguousarray(t[::every]), np.ascontiguousarray(o[::every])
        # Column j of Q is A^(L-1-j) B.
        v = ss.b.copy()
        for j in range(length - 1, -1, -1):
            cols[:, j] = v
            v = ss.a @ v
        return cls(t, o, ak, cols)

    def run(self, x: F64, state: F64) -> tuple[F64, F64]:
        """x (channels, length); state (order, channels) -> (y (channels, length), state)."""
        y = np.empty((x.shape[0], self.t.shape[0]))
        s = np.empty_like(state)
        for c in range(x.shape[0]):           # matrix-vector per channel: BLAS gemv is
            xc, sc = x[c], state[:, c]        # several times faster than gemm with 2 columns
            y[c] = self.t @ xc
            y[c] += self.o @ sc
            s[:, c] = self.p @ sc
            s[:, c] += self.q @ xc
        return y, s


@dataclass(frozen=True)
class DecimatedFirstOrder:
    """A one-state :class:`BlockFilter` with ``every`` > 1 (only every so many outputs kept),
    run as a recursion over the kept outputs: the state at each kept output follows from the
    previous one as ``s_(j+1) = A^every s_j + g · x[every j .. every j + every - 1]``, all
    ``length / every`` of them in one small lower-triangular product. The same values as the
    :class:`BlockFilter` up to rounding, at a fraction of its cost (its T is length/every by
    length; here the matrices are length/every square and ``every`` long)."""

    g: F64           # (every,) weight of each input sample in a step's state increment
    m: F64           # (k, k) states at the kept outputs from the increments, k = length/every
    apow: F64        # (k,) A^(every j): the initial state's share in each kept output's state
    d: float         # direct feed-through
    step: float      # A^every
    every: int
    p: F64           # (1, 1) state transition over a whole chunk (for steady states)
    q: F64           # (1, length) state increment from each input of a chunk

    @classmethod
    def build(cls, ss: StateSpace, length: int, every: int) -> DecimatedFirstOrder:
        if ss.a.shape != (1, 1) or length % every:
            raise ValueError("a one-state filter and a chunk of whole steps are needed")
        a, b = float(ss.a[0, 0]), float(ss.b[0])
        k = length // every
        g = b * a ** np.arange(every - 1, -1, -1, dtype=np.float64)
        step = a**every
        lag = np.arange(k)[:, None] - np.arange(k)[None, :] - 1         # j - 1 - l
        m = np.where(lag >= 0, step ** np.maximum(lag, 0), 0.0)
        q = (b * a ** np.arange(length - 1, -1, -1, dtype=np.float64))[None, :]
        return cls(g, m, step ** np.arange(k, dtype=np.float64), float(ss.d), step, every,
                   np.array([[a**length]]), q)

    def run(self, x: F64, state: F64) -> tuple[F64, F64]:
        """x (channels, length); state (1, channels) -> (every ``every``-th output
        (channels, length / every), new state (1, channels))."""
        c = x.shape[0]
        u = x.reshape(c, -1, self.every) @ self.g            # (channels, k) state increments
        s = u @ self.m.T                                      # states at the kept outputs
        s += state.T * self.apow
        y = x[:, ::self.every] * self.d
        y += s
        return y, (s[:, -1] * self.step + u[:, -1])[None, :]


@dataclass(frozen=True)
class SubBlockFilter:
    """:class:`BlockFilter` over ``nsub`` sub-blocks of a chunk at once: the states at the
    sub-block starts follow from ``s' = P s + Q x`` (a few small products), then every
    sub-block's output is one matrix product ``Y = T X + O S`` with the sub-blocks (of every
    channel) as columns: about nsub times fewer multiplications than one big block."""

    block: BlockFilter
    nsub: int

    @property
    def p(self) -> F64:
        return self.block.p

    @property
    def q(self) -> F64:
        return self.block.q

    def run(self, x: F64, state: F64) -> tuple[F64, F64]:
        """x (channels, nsub * sub); state (order, channels) -> (y, new state)."""
        b, k = self.block, self.nsub
        c, sub = x.shape[0], x.shape[1] // k
        xm = x.reshape(c * k, sub).T                      # (sub, channels * nsub)
        qx = (b.q @ xm).reshape(-1, c, k)                 # (order, channels, nsub)
        st = np.empty_like(qx)
        s = state
        for j in range(k):
            st[:, :, j] = s
            s = b.p @ s
            s += qx[:, :, j]
        y = b.t @ xm                                      # (rows, channels * nsub)
        y += b.o @ st.reshape(-1, c * k)
        return np.ascontiguousarray(y.T).reshape(c, -1), s


@dataclass(frozen=True)
class FirstOrder:
    """A first-order digital section y[n] = r y[n-1] + b0 x[n] + b1 x[n-1] run over a chunk
    in closed form, ``y[n] = r^n (r y[-1] + Σ_k≤n u[k] r^-k)`` with u = b0 x[n] + b1 x[n-1],
    vectorised over channels (r^-L stays small for the slow poles used here); the state is
    (y[-1], x[-1])."""

    r: float
    b0: float
    b1: float
    rpow: F64        # r^n, n = 0..L-1
    rinv: F64        # r^-n

    @classmethod
    def build(cls, b: F64, a: F64, length: int) -> FirstOrder:
        r = -float(a[1])
        n = np.arange(length, dtype=np.float64)
        return cls(r, float(b[0]), float(b[1]), r**n, r**-n)

    def run(self, x: F64, state: F64) -> tuple[F64, F64]:
        """x (channels, length); state (2, channels) = (y[-1], x[-1])."""
        u = self.b0 * x
        u[:, 0] += self.b1 * state[1]
        u[:, 1:] += self.b1 * x[:, :-1]
        u *= self.rinv
        acc = np.cumsum(u, axis=1)
        acc += (self.r * state[0])[:, None]
        acc *= self.rpow
        return acc, np.stack([acc[:, -1], x[:, -1]])

    def steady_state(self, level: F64) -> F64:
        """State after a long constant input ``level`` (channels,)."""
        gain = (self.b0 + self.b1) / (1.0 - self.r)
        return np.stack([level * gain, level])


# ---------------------------------------------------------------------------- statistics
def pst_from_pinst(pinst: npt.ArrayLike) -> float:
    """Pst from Pinst samples of one 10-min interval (exact percentiles; NaN if empty).

    P_x is the level exceeded x % of the time; smoothed P1s, P3s, P10s, P50s are the means of
    the listed percentiles.

    References
    ----------
    IEC 61000-4-15 Ed.2 clause 4.7.2 (published; tests/SOURCES.md).
    """
    p = np.asarray(pinst, dtype=np.float64)
    p = p[np.isfinite(p)]
    if p.shape[0] == 0:
        return math.nan
    qs = [x for _, group in PST_TERMS for x in group]
    vals = dict(zip(qs, np.percentile(p, [100.0 - x for x in qs]), strict=True))
    total = sum(w * float(np.mean([vals[x] for x in group])) for w, group in PST_TERMS)
    return math.sqrt(max(total, 0.0))


def plt_from_pst(pst: npt.ArrayLike) -> float:
    """Plt = cube root of the mean of Pst³ over 12 consecutive Pst (2 h); NaN if any is
    missing (IEC 61000-4-15 Ed.2, from memory)."""
    p = np.asarray(pst, dtype=np.float64)
    if p.shape[0] != 12 or not np.isfinite(p).all():
        return math.nan
    return float(np.cbrt(np.mean(p**3)))


# ---------------------------------------------------------------------------- streaming meter
@dataclass
class FlickerInterval:
    """Pst of one clock-aligned 10-min interval; ``flagged`` when the meter was settling or
    the interval is incomplete; ``plt`` at the intervals that end a 2-h mark."""

    period: int                       # floor(utc / 600)
    pst: tuple[float, ...]
    flagged: bool
    plt: tuple[float, ...] | None = None
    seconds: float = 0.0              # seconds of valid Pinst in the interval


@dataclass
class FlickerMeter:
    """Streaming flickermeter for ``channels`` channels of volts at ``fs``.

    Feed it sample blocks with their start index (:meth:`feed`); ``utc_of`` maps a sample
    index to UTC [s] for the clock-aligned 10-min intervals. ``nominal_v`` [V] sets the level
    below which the meter resets (interruption: below 10 % of it).
    """

    fs: float
    channels: int
    nominal_v: float
    lamp: str = "230V"
    nominal_hz: float = 50.0
    decim: int = field(init=False)
    rate: float = field(init=False)

    def __post_init__(self) -> None:
        self.decim = max(1, int(self.fs // DECIMATED_RATE))
        self.rate = self.fs / self.decim
        chain = cascade(digital_sections(self.lamp, self.rate, self.nominal_hz))
        self._main = SubBlockFilter(BlockFilter.build(chain, CHUNK // MAIN_SUBBLOCKS),
                                    MAIN_SUBBLOCKS)
        # The adaptor's output moves by about 1/(τ rate) of a deviation per sample: it is
        # computed every PINST_STEP-th sample and held in between (a relative error below
        # 1e-4 of the deviation, far below any flicker level).
        self._adapt = DecimatedFirstOrder.build(
            cascade([first_order_lowpass(ADAPTOR_TAU_S, self.rate)]), CHUNK, PINST_STEP)
        self._smooth = DecimatedFirstOrder.build(
            cascade([first_order_lowpass(SMOOTHING_TAU_S, self.rate)]), CHUNK, PINST_STEP)
        self._reset_level = (0.1 * self.nominal_v) ** 2
        # The main chain's state after a long constant input 1: s = P s + Q 1.
        self._main_steady = self._steady(self._main)
        self._adapt_steady = self._steady(self._adapt)[:, 0]
        self.reset(None)
        self._pinst: dict[int, list[F64]] = {}
        self._settling: dict[int, bool] = {}
        self._recent: dict[int, tuple[float, ...]] = {}
        self._last_index: int | None = None

    @staticmethod
    def _steady(f: BlockFilter | SubBlockFilter | DecimatedFirstOrder) -> F64:
        """A filter's state after a long constant input 1: s = P s + Q 1."""
        return np.linalg.solve(np.eye(f.p.shape[0]) - f.p, f.q.sum(axis=1, keepdims=True))

    def reset(self, at_index: int | None) -> None:
        """Restart the filters (start, gap); values settle for SETTLE_S."""
        c = self.channels
        self._acc: npt.NDArray[np.floating] = np.zeros((c, 0))  # not yet a group of D samples
        self._acc_start: int | None = at_index
        self._dec = np.zeros((c, 0))          # decimated values not yet a full chunk
        self._dec_first = 0                   # sample index of self._dec[:, 0]
        self._s_main = np.zeros((self._main.p.shape[0], c))
        self._s_adapt = np.zeros((1, c))
        self._s_smooth = np.zeros((1, c))
        self._live = np.zeros(c, bool)        # channel's filters primed and running
        self._settle_left = np.full(c, int(SETTLE_S * self.rate))

    def feed(self, rows: npt.NDArray[np.floating], start: int,
             utc_of: Callable[[float], float]) -> list[FlickerInterval]:
        """Add samples, channel-major (channels, n) [V], starting at sample ``start``; returns
        the 10-min intervals completed. A jump in ``start`` (lost samples) restarts the
        filters."""
        if self._acc_start is not None and self._acc_start + self._acc.shape[1] != start:
            self.reset(None)
        if self._acc_start is None:
            self._acc_start = start           # groups and chunks anchored to the stream
        buf = np.concatenate([self._acc, rows], axis=1) if self._acc.shape[1] else rows
        groups = buf.shape[1] // self.decim
        used = groups * self.decim
        if groups:
            if not self._dec.shape[1]:
                self._dec_first = self._acc_start
            # Sums of D squares in float64 (exact squares of the float32 volts), in one call.
            g = buf[:, :used].reshape(self.channels, groups, self.decim)
            dec = np.einsum("cgd,cgd->cg", g, g, dtype=np.float64)
            dec *= 1.0 / self.decim
            self._dec = np.concatenate([self._dec, dec], axis=1) if self._dec.shape[1] else dec
        self._acc = buf[:, used:].copy()
        self._acc_start += used
        out: list[FlickerInterval] = []
        while self._dec.shape[1] >= CHUNK:
            x = self._dec[:, :CHUNK]
            self._dec = self._dec[:, CHUNK:]
            first = self._dec_first
            self._dec_first += CHUNK * self.decim
            out += self._chunk(x, first, utc_of)
        return out

    def _chunk(self, w: F64, first: int, utc_of: Callable[[float], float]
               ) -> list[FlickerInterval]:
        level = w.mean(axis=1)
        dead = level < self._reset_level      # interruption or lost leg: restart that channel
        if dead.any():
            self._live &= ~dead
            self._settle_left[dead] = int(SETTLE_S * self.rate)
        start = ~self._live & ~dead
        if start.any():
            # Prime from the chunk: the adaptor at its mean square, the chain in its steady
            # state for the normalised level 1 (no start step).
            self._s_adapt[:, start] = self._adapt_steady * level[start]
            self._s_main[:, start] = self._main_steady
            self._s_smooth[:, start] = 0.0
            self._live |= start
        mean_sq, self._s_adapt = self._adapt.run(w, self._s_adapt)
        norm = w / np.repeat(np.maximum(mean_sq, 1e-30), PINST_STEP, axis=1)
        y, self._s_main = self._main.run(norm, self._s_main)
        y *= y
        p, self._s_smooth = self._smooth.run(y, self._s_smooth)  # every PINST_STEP-th value
        pk = p.T * PINST_GAIN
        if not self._live.all():
            pk[:, ~self._live] = np.nan
        settling = bool(self._settle_left.any())
        if settling:
            self._settle_left = np.maximum(0, self._settle_left - w.shape[1])
        return self._store(pk, first, utc_of, settling)

    def _store(self, p: F64, first: int, utc_of: Callable[[float], float], settling: bool
               ) -> list[FlickerInterval]:
        if not p.shape[0]:
            return []
        step = PINST_STEP * self.decim
        self._last_index = first + (p.shape[0] - 1) * step
        u0, u1 = utc_of(float(first)), utc_of(float(self._last_index))
        p0, p1 = math.floor(u0 / 600.0), math.floor(u1 / 600.0)
        if p0 == p1:                          # the common case: one period
            self._pinst.setdefault(p0, []).append(p)
            self._settling[p0] = self._settling.get(p0, False) or settling
        else:
            periods = np.floor(np.linspace(u0, u1, p.shape[0]) / 600.0).astype(np.int64)
            for per in np.unique(periods).tolist():
                self._pinst.setdefault(per, []).append(p[periods == per])
                self._settling[per] = self._settling.get(per, False) or settling
        if len(self._pinst) == 1:
            return []
        return [self._close(per) for per in sorted(k for k in self._pinst if k < p1)]

    def _close(self, per: int) -> FlickerInterval:
        rows = np.concatenate(self._pinst.pop(per))
        settling = self._settling.pop(per, False)
        seconds = rows.shape[0] * PINST_STEP / self.rate
        valid = np.isfinite(rows).all(axis=1)
        full = seconds >= 600.0 - 2 * CHUNK / self.rate
        pst = tuple(pst_from_pinst(rows[valid, c]) for c in range(self.channels))
        iv = FlickerInterval(per, pst, settling or not full or not valid.all(), None, seconds)
        if not iv.flagged:
            self._recent[per] = pst
        for k in [k for k in self._recent if k <= per - 12]:
            del self._recent[k]
        if (per + 1) % 12 == 0:
            window = [self._recent.get(k) for k in range(per - 11, per + 1)]
            iv.plt = tuple(
                plt_from_pst([w[c] if w is not None else math.nan for w in window])
                for c in range(self.channels))
        return iv

    def finish(self) -> list[FlickerInterval]:
        """End of data: close every open interval (incomplete ones are flagged)."""
        out = [self._close(per) for per in sorted(self._pinst)]
        self.reset(None)
        return out

    @property
    def frontier(self) -> int | None:
        """Sample index of the newest Pinst value classified (None before any): every
        10-min interval that ends at or before it is closed."""
        return self._last_index
