"""Keyed random draws: each number a pure function of (seed, stream, device, counter, lane).

A keyed draw does not depend on how many numbers were drawn before it, nor on which other
devices were drawn with it: two runs of one seed that differ in a setting see the same
draws for a device wherever the device's own history agrees (common random numbers that
hold draw by draw, not only while the runs consume a stream in the same order).

The core is the output function of SplitMix64 (Steele, Lea and Flood, "Fast splittable
pseudorandom number generators", OOPSLA 2014; the function of Java's ``SplittableRandom``
and of Vigna's ``splitmix64.c``, from memory)::

    z += 0x9e3779b97f4a7c15
    z = (z ^ (z >> 30)) * 0xbf58476d1ce4e5b9
    z = (z ^ (z >> 27)) * 0x94d049bb133111eb
    return z ^ (z >> 31)

in 64-bit unsigned arithmetic with wrap-around. :func:`mix64` applies it to arrays and
:func:`splitmix64` is the generator step it comes from (state += gamma, output mixed), for
checking against published outputs. Each step of the mix is a bijection of the 64-bit
words, so a draw's bits are a chain of mixes::

    h = mix(mix(mix(key ^ device) ^ counter) ^ lane)

with ``key`` = mix(mix(seed) ^ crc32(stream name)) (:func:`stream_key`): for fixed other
inputs, distinct devices (counters, lanes) give distinct words. A uniform in [0, 1) is the
word's top 53 bits times 2**-53; an exponential is -log1p(-u); a standard normal is the
normal quantile (``scipy.special.ndtri``, exact to rounding) of the midpoint uniform
(top 53 bits + 1/2) * 2**-53, which lies strictly inside (0, 1) (:func:`to_normal`).

:class:`KeyedStream` draws by (device, counter, lane); :class:`TickDraws` takes the counter
from a time on each device's check-in grid (the index k of the tick phase + k x period), as
the engine keys every draw about a device; :class:`OrderedDraws` has the same methods
drawing in order from a ``numpy.random.Generator`` (for callers that hand one in).
"""

from __future__ import annotations

import zlib

import numpy as np
from scipy import special

__all__ = ["GAMMA", "mix64", "splitmix64", "stream_key", "KeyedStream", "KeyedAt", "TickDraws", "OrderedDraws",
           "OrderedAt", "as_draws", "to_normal"]

GAMMA = 0x9E3779B97F4A7C15
"""SplitMix64's increment (the golden gamma, 2**64 / the golden ratio, odd)."""

_M1 = 0xBF58476D1CE4E5B9
_M2 = 0x94D049BB133111EB
_MASK = (1 << 64) - 1
_TO_UNIT = 2.0**-53


def _mix_int(z: int) -> int:
    """The output function on one Python int (the reference for :func:`mix64`)."""
    z = (z + GAMMA) & _MASK
    z = ((z ^ (z >> 30)) * _M1) & _MASK
    z = ((z ^ (z >> 27)) * _M2) & _MASK
    return z ^ (z >> 31)


def splitmix64(state: int) -> tuple[int, int]:
    """One step of the SplitMix64 generator: (the next state, the output), as Python ints.

    From state 0 the outputs are 0xe220a8397b1dcdaf, 0x6e789e6aa1b965f4, ... (the reference
    values of tests/test_keyed.py)."""
    return (state + GAMMA) & _MASK, _mix_int(state)


def _mix(z: np.ndarray) -> np.ndarray:
    """The output function applied in place to a uint64 array (returned). numpy's integer
    arrays wrap around silently (no overflow check is made on them); only numpy scalars
    warn, and none are used here."""
    z += GAMMA
    z ^= z >> 30
    z *= _M1
    z ^= z >> 27
    z *= _M2
    z ^= z >> 31
    return z


def mix64(z: np.ndarray | int) -> np.ndarray:
    """The SplitMix64 output function of each 64-bit word of ``z`` (a new uint64 array)."""
    return _mix(_words(z).copy())


def _words(x: np.ndarray | int) -> np.ndarray:
    """``x`` as uint64 words (at least 1-D; negative integers in two's complement)."""
    a = np.asarray(x)
    if a.dtype != np.uint64:
        a = np.asarray(a, dtype=np.int64).view(np.uint64)
    return a.reshape(1) if a.ndim == 0 else a


def stream_key(seed: int, name: str) -> int:
    """The key of the stream ``name`` of run ``seed``: mix(mix(seed) ^ crc32(name))."""
    return _mix_int(_mix_int(int(seed) & _MASK) ^ zlib.crc32(name.encode()))


def _unit(h: np.ndarray) -> np.ndarray:
    return (h >> 11).astype(np.float64) * _TO_UNIT


def to_normal(u: np.ndarray) -> np.ndarray:
    """The standard normal of a keyed uniform ``u`` (a multiple of 2**-53 in [0, 1)): the
    normal quantile at the midpoint u + 2**-54 of u's cell, strictly inside (0, 1). Above 1/2
    it is taken as -ndtri(1 - u - 2**-54), where that midpoint is exact (u + 2**-54 would
    round to 1 in the top cell)."""
    upper = u >= 0.5
    q = np.where(upper, (1.0 - u) - 0.5 * _TO_UNIT, u + 0.5 * _TO_UNIT)
    z = special.ndtri(q)
    return np.where(upper, -z, z)


def _normal(h: np.ndarray) -> np.ndarray:
    return to_normal(_unit(h))


def _lane_words(lane: np.ndarray | int) -> np.ndarray | int:
    return _words(lane) if np.ndim(lane) else int(lane) & _MASK


class KeyedStream:
    """The draws of one stream of one run, by (device, counter, lane).

    ``device`` and ``counter`` are integer arrays of one shape (or broadcastable); ``lane``
    an integer or an integer array broadcast against them (e.g. shape (m, 1) for m lanes of
    n devices: the result is (m, n)). :meth:`prefix` and :meth:`finish` split the chain of
    mixes, so that several lanes of the same (device, counter) pay for its first two mixes
    once."""

    def __init__(self, seed: int, name: str):
        self.seed = int(seed)
        self.name = name
        self.key = stream_key(seed, name)

    def prefix(self, device: np.ndarray, counter: np.ndarray) -> np.ndarray:
        """mix(mix(key ^ device) ^ counter): the words every lane of (device, counter) starts from."""
        z = _words(device) ^ self.key  # a new array: the caller's stays as it was
        _mix(z)
        z ^= _words(counter)
        return _mix(z)

    @staticmethod
    def finish(prefix: np.ndarray, lane: np.ndarray | int = 0) -> np.ndarray:
        """mix(prefix ^ lane) (a new array)."""
        return _mix(prefix ^ _lane_words(lane))

    def bits(self, device: np.ndarray, counter: np.ndarray, lane: np.ndarray | int = 0) -> np.ndarray:
        """The 64-bit words mix(mix(mix(key ^ device) ^ counter) ^ lane)."""
        z = self.prefix(device, counter)
        z = z ^ _lane_words(lane) if np.ndim(lane) else np.bitwise_xor(z, _lane_words(lane), out=z)
        return _mix(z)

    def uniform(self, device: np.ndarray, counter: np.ndarray, lane: np.ndarray | int = 0) -> np.ndarray:
        """Uniform in [0, 1): the top 53 bits of :meth:`bits` times 2**-53."""
        return _unit(self.bits(device, counter, lane))

    def exponential(self, device: np.ndarray, counter: np.ndarray, lane: np.ndarray | int = 0) -> np.ndarray:
        """Standard exponential: -log1p(-u), u the :meth:`uniform` (finite: u < 1)."""
        return -np.log1p(-self.uniform(device, counter, lane))

    def normal(self, device: np.ndarray, counter: np.ndarray, lane: np.ndarray | int = 0) -> np.ndarray:
        """Standard normal: ndtri of the midpoint uniform (top 53 bits + 1/2) x 2**-53."""
        return _normal(self.bits(device, counter, lane))


class KeyedAt:
    """Keyed draws of some (device, counter) pairs, their first two mixes done once
    (:meth:`TickDraws.at`). ``positions`` pick pairs (None: all); ``lane`` as in
    :class:`KeyedStream`."""

    def __init__(self, head: np.ndarray):
        self.head = head

    def _bits(self, positions: np.ndarray | None, lane: np.ndarray | int) -> np.ndarray:
        return KeyedStream.finish(self.head if positions is None else self.head[positions], lane)

    def uniform(self, positions: np.ndarray | None, lane: np.ndarray | int = 0) -> np.ndarray:
        return _unit(self._bits(positions, lane))

    def exponential(self, positions: np.ndarray | None, lane: np.ndarray | int = 0) -> np.ndarray:
        return -np.log1p(-self.uniform(positions, lane))

    def normal(self, positions: np.ndarray | None, lane: np.ndarray | int = 0) -> np.ndarray:
        return _normal(self._bits(positions, lane))


class TickDraws:
    """A :class:`KeyedStream` whose counter is a check-in tick: device i's ticks are at
    ``phase[i] + k * period``, and a draw at time t is keyed by the k of the tick nearest t
    (exact for the tick times themselves, whatever rounding computed them)."""

    def __init__(self, stream: KeyedStream, phase: np.ndarray, period: float):
        self.stream = stream
        self.phase = phase
        self.period = float(period)

    def tick(self, devices: np.ndarray, t: np.ndarray) -> np.ndarray:
        """The tick index k of each device's tick nearest ``t`` (int64)."""
        return np.rint((t - self.phase[devices]) / self.period).astype(np.int64)

    def tick_from(self, devices: np.ndarray, since: float) -> np.ndarray:
        """The index of each device's first tick at or after ``since`` (int64; a tick within
        1e-9 periods before ``since`` counts as at it)."""
        return np.ceil((since - self.phase[devices]) / self.period - 1e-9).astype(np.int64)

    def at(self, devices: np.ndarray, t: np.ndarray) -> KeyedAt:
        """The draws of ``devices`` at the ticks nearest ``t``, for any number of lanes."""
        return KeyedAt(self.stream.prefix(devices, self.tick(devices, t)))

    def uniform(self, devices: np.ndarray, t: np.ndarray, lane: np.ndarray | int = 0) -> np.ndarray:
        return self.stream.uniform(devices, self.tick(devices, t), lane)

    def uniform_from(self, devices: np.ndarray, since: float, lane: np.ndarray | int = 0) -> np.ndarray:
        """:meth:`uniform` keyed by each device's first tick at or after ``since``."""
        return self.stream.uniform(devices, self.tick_from(devices, since), lane)

    def exponential(self, devices: np.ndarray, t: np.ndarray, lane: np.ndarray | int = 0) -> np.ndarray:
        return self.stream.exponential(devices, self.tick(devices, t), lane)

    def normal(self, devices: np.ndarray, t: np.ndarray, lane: np.ndarray | int = 0) -> np.ndarray:
        return self.stream.normal(devices, self.tick(devices, t), lane)


def _shape(count: np.ndarray | int | None, lane: np.ndarray | int) -> tuple[int, ...]:
    return np.broadcast_shapes(np.shape(count) if count is not None else (), np.shape(lane))


class OrderedDraws:
    """The methods of :class:`TickDraws` drawing in order from a ``numpy.random.Generator``:
    one number per (lane, device) entry of the broadcast shape, the devices and times unread."""

    def __init__(self, rng: np.random.Generator):
        self.rng = rng

    def at(self, devices: np.ndarray, t: np.ndarray) -> OrderedAt:
        return OrderedAt(self.rng, devices.size)

    def uniform(self, devices: np.ndarray, t: np.ndarray, lane: np.ndarray | int = 0) -> np.ndarray:
        return self.rng.random(_shape(devices, lane))

    def uniform_from(self, devices: np.ndarray, since: float, lane: np.ndarray | int = 0) -> np.ndarray:
        return self.rng.random(_shape(devices, lane))

    def exponential(self, devices: np.ndarray, t: np.ndarray, lane: np.ndarray | int = 0) -> np.ndarray:
        return self.rng.exponential(1.0, size=_shape(devices, lane))

    def normal(self, devices: np.ndarray, t: np.ndarray, lane: np.ndarray | int = 0) -> np.ndarray:
        return self.rng.standard_normal(_shape(devices, lane))


class OrderedAt:
    """:class:`KeyedAt`'s methods drawing in order from a Generator."""

    def __init__(self, rng: np.random.Generator, size: int):
        self.rng = rng
        self.size = size

    def _shape(self, positions: np.ndarray | None, lane: np.ndarray | int) -> tuple[int, ...]:
        return _shape(positions if positions is not None else np.empty(self.size), lane)

    def uniform(self, positions: np.ndarray | None, lane: np.ndarray | int = 0) -> np.ndarray:
        return self.rng.random(self._shape(positions, lane))

    def exponential(self, positions: np.ndarray | None, lane: np.ndarray | int = 0) -> np.ndarray:
        return self.rng.exponential(1.0, size=self._shape(positions, lane))

    def normal(self, positions: np.ndarray | None, lane: np.ndarray | int = 0) -> np.ndarray:
        return self.rng.standard_normal(self._shape(positions, lane))


def as_draws(source: TickDraws | OrderedDraws | np.random.Generator) -> TickDraws | OrderedDraws:
    """``source`` as a draw source: a Generator becomes :class:`OrderedDraws`; others as they are."""
    return OrderedDraws(source) if isinstance(source, np.random.Generator) else source
