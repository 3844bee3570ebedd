"""Delta coding and bit packing of per-second integer arrays (the summary ``packed`` form).

A packed array is ``[exp, first, width, deltas, mask?]`` (see ``schemas/summary.schema.json``
``$defs/packed``): values are quantised to integer units of 10^exp, the first value is kept
as is, and the n-1 differences are zigzag-mapped to unsigned integers and bit-packed at the
smallest width that holds them, least significant bit first. Missing values (NaN) repeat the
previous value (delta 0) and are marked in a bit mask, so the stream stays exact.
"""

from __future__ import annotations

import math
from collections.abc import Sequence

import numpy as np
import numpy.typing as npt

from agent.wire.errors import WireError

I64 = npt.NDArray[np.int64]
F64 = npt.NDArray[np.float64]
BOOL = npt.NDArray[np.bool_]

INT32_MIN = -(2**31)
INT32_MAX = 2**31 - 1
MAX_WIDTH = 33  # int32 extremes differ by up to 2^32 - 1: 33 zigzag bits


def zigzag(d: I64) -> npt.NDArray[np.uint64]:
    """Map signed to unsigned: 0, -1, 1, -2, 2 ... -> 0, 1, 2, 3, 4 (as in protobuf)."""
    d = np.asarray(d, dtype=np.int64)
    return ((d << 1) ^ (d >> 63)).astype(np.uint64)


def unzigzag(z: npt.NDArray[np.uint64]) -> I64:
    """Inverse of :func:`zigzag`."""
    z = np.asarray(z, dtype=np.uint64)
    return ((z >> np.uint64(1)).astype(np.int64)) ^ -((z & np.uint64(1)).astype(np.int64))


def bit_width(z: npt.NDArray[np.uint64]) -> int:
    """Bits needed for the largest value of ``z`` (0 for an empty or all-zero array)."""
    if z.size == 0:
        return 0
    top = int(z.max())
    return top.bit_length()


def pack_bits(z: npt.NDArray[np.uint64], width: int) -> bytes:
    """Pack each value of ``z`` into ``width`` bits, LSB first, into little-endian bytes."""
    if width == 0 or z.size == 0:
        return b""
    shifts = np.arange(width, dtype=np.uint64)
    bits = ((z[:, None] >> shifts) & np.uint64(1)).astype(np.uint8)
    return np.packbits(bits.ravel(), bitorder="little").tobytes()


_ARANGE = np.arange(4096, dtype=np.int64)


def _arange(count: int) -> I64:
    """0..count-1 as int64, a view of a shared array (grown on demand)."""
    global _ARANGE
    if count > _ARANGE.size:
        _ARANGE = np.arange(max(count, 2 * _ARANGE.size), dtype=np.int64)
    return _ARANGE[:count]


def _gather_bits(buf: bytes, starts: I64, widths: I64, count: int) -> I64:
    """Fields of ``widths`` bits at bit ``starts + i * widths`` (i < count), LSB first.

    ``starts`` and ``widths`` have shape (A, 1); the result has shape (A, count). Each field
    (at most 33 bits at a bit offset below 8) lies inside the little-endian 8-byte word that
    begins at its first byte, so one gather, one shift and one mask read every field of
    every array at once (no per-bit expansion).
    """
    padded = buf + bytes(8)
    words = np.ndarray((len(padded) - 7,), dtype="<i8", buffer=padded, strides=(1,))
    pos = starts + _arange(count) * widths
    # Arithmetic shift by < 8 is safe: the sign bits stay above bit 40, the mask keeps < 34.
    fields: I64 = (words[pos >> 3] >> (pos & 7)) & ((1 << widths) - 1)
    return fields


def _check_stream(data: bytes, count: int, width: int) -> None:
    """Exact length ceil(count*width/8) and zero padding bits (one canonical encoding)."""
    bits = count * width
    need = (bits + 7) // 8
    if len(data) != need:
        raise WireError(f"deltas hold {len(data)} bytes, {count} x {width} bits need {need}",
                        "array")
    if bits % 8 and data[-1] >> (bits % 8):
        raise WireError("nonzero padding bits after the last delta", "array")


def _check_mask_bytes(data: bytes, n: int) -> None:
    need = (n + 7) // 8
    if len(data) != need:
        raise WireError(f"mask holds {len(data)} bytes, {n} values need {need}", "array")
    if n % 8 and data[-1] >> (n % 8):
        raise WireError("nonzero padding bits after the last mask bit", "array")


def unpack_bits(data: bytes, count: int, width: int) -> npt.NDArray[np.uint64]:
    """Inverse of :func:`pack_bits`; ``data`` must hold exactly ceil(count*width/8) bytes and
    its padding bits must be zero (one canonical encoding per array)."""
    _check_stream(data, count, width)
    if width == 0 or count == 0:
        return np.zeros(count, dtype=np.uint64)
    start, bits = np.zeros((1, 1), dtype=np.int64), np.full((1, 1), width, dtype=np.int64)
    return _gather_bits(bytes(data), start, bits, count)[0].astype(np.uint64)


def pack_mask(missing: BOOL) -> bytes:
    return np.packbits(np.asarray(missing, dtype=bool), bitorder="little").tobytes()


def unpack_mask(data: bytes, n: int) -> BOOL:
    _check_mask_bytes(data, n)
    bits = np.unpackbits(np.frombuffer(data, dtype=np.uint8), count=n, bitorder="little")
    return bits.astype(bool)


def pack_units(units: I64, missing: BOOL | None, exp: int) -> list[object]:
    """Delta-code and bit-pack integer ``units``; masked positions are coded as repeats."""
    units = np.asarray(units, dtype=np.int64).copy()
    if units.ndim != 1 or units.size == 0:
        raise WireError("a packed array needs a 1-D array of at least one value", "encode")
    has_missing = missing is not None and bool(np.any(missing))
    if has_missing:
        assert missing is not None
        miss = np.asarray(missing, dtype=bool)
        if miss.all():
            units[:] = 0
        else:
            # Carry the last present value forward (the first present one backward).
            idx = np.where(~miss, np.arange(units.size), 0)
            np.maximum.accumulate(idx, out=idx)
            first_present = int(np.argmax(~miss))
            idx[:first_present] = first_present
            units = units[idx]
    if units.min() < INT32_MIN or units.max() > INT32_MAX:
        raise WireError(f"value outside int32 units of 1e{exp}", "encode")
    z = zigzag(np.diff(units))
    width = bit_width(z)
    packed: list[object] = [int(exp), int(units[0]), width, pack_bits(z, width)]
    if has_missing:
        packed.append(pack_mask(np.asarray(missing, dtype=bool)))
    return packed


def unpack_units(packed: list[object], n: int) -> tuple[I64, BOOL]:
    """Integer units and the missing mask of a packed array of ``n`` values.

    The caller has checked the element types against the schema; this checks the sizes.
    """
    units, missing = unpack_units_many([packed], n)
    return units[0], missing[0]


def check_header(packed: Sequence[object], n: int) -> tuple[int, int]:
    """``(first, width)`` of a packed array of ``n`` values after the checks that need no
    decoding: deltas and mask are bytes of exactly the right length with zero padding bits.
    The caller has checked the element types against the schema."""
    if n < 1:
        raise WireError("a packed array holds at least one value", "array")
    first, width, data = int(packed[1]), int(packed[2]), packed[3]  # type: ignore[call-overload]
    if not isinstance(data, bytes):
        raise WireError("deltas must be bytes", "array")
    if not 0 <= width <= MAX_WIDTH:
        raise WireError(f"width {width} outside 0..{MAX_WIDTH}", "array")
    _check_stream(data, n - 1, width)
    if len(packed) > 4:
        mask_data = packed[4]
        if not isinstance(mask_data, bytes):
            raise WireError("mask must be bytes", "array")
        _check_mask_bytes(mask_data, n)
    return first, width


def value_span(n: int, width: int) -> int:
    """Largest possible ``|value[i] - first|`` of ``n`` values with ``width``-bit deltas
    [units]: a zigzag code below 2^width is a delta of magnitude at most 2^(width-1)."""
    return (n - 1) << (width - 1) if width else 0


def unpack_units_many(arrays: Sequence[Sequence[object]], n: int) -> tuple[I64, BOOL]:
    """Units and missing masks of several packed arrays of ``n`` values each, shape (A, n).

    The same checks as :func:`unpack_units` on every array (a few scalar checks of each
    header, then one numpy pass over all payloads together); the error names the array's
    position in ``arrays`` when there is more than one.
    """
    if n < 1:
        raise WireError("a packed array holds at least one value", "array")
    count = n - 1
    starts: list[int] = []
    widths: list[int] = []
    firsts: list[int] = []
    chunks: list[bytes] = []
    masks: list[bytes] = []
    mask_rows: list[int] = []
    offset = 0
    in_int32 = True  # proven without decoding (see value_span)
    for row, packed in enumerate(arrays):
        try:
            first, width = check_header(packed, n)
        except WireError as exc:
            if len(arrays) == 1:
                raise
            raise WireError(f"array {row}: {exc.reason}", exc.code) from None
        data: bytes = packed[3]  # type: ignore[assignment]
        if len(packed) > 4:
            masks.append(packed[4])  # type: ignore[arg-type]
            mask_rows.append(row)
        span = value_span(n, width)
        in_int32 = in_int32 and INT32_MIN + span <= first <= INT32_MAX - span
        starts.append(8 * offset)
        widths.append(width)
        firsts.append(first)
        chunks.append(data)
        offset += len(data)
    rows = len(firsts)
    units = np.empty((rows, n), dtype=np.int64)
    missing = np.zeros((rows, n), dtype=bool)
    if rows == 0:
        return units, missing
    head = np.array([starts, widths, firsts], dtype=np.int64)[:, :, None]
    units[:, :1] = head[2]
    if count:
        z = _gather_bits(b"".join(chunks), head[0], head[1], count)
        np.cumsum((z >> 1) ^ -(z & 1), axis=1, out=units[:, 1:])  # unzigzag, then sum
        units[:, 1:] += head[2]
    if not in_int32 and (units.min() < INT32_MIN or units.max() > INT32_MAX):
        if rows == 1:
            raise WireError("decoded value outside int32 units", "array")
        outside = (units < INT32_MIN).any(axis=1) | (units > INT32_MAX).any(axis=1)
        bad = int(np.flatnonzero(outside)[0])
        raise WireError(f"array {bad}: decoded value outside int32 units", "array")
    if masks:
        stacked = np.frombuffer(b"".join(masks), dtype=np.uint8).reshape(len(masks), -1)
        missing[mask_rows] = np.unpackbits(stacked, axis=1, count=n, bitorder="little")
    return units, missing


def quantise(values: F64, exp: int) -> tuple[I64, BOOL]:
    """Round ``values`` to integer units of 10^exp; NaN becomes a missing value.

    Infinite values are an error (a measurement never yields them).
    """
    v = np.asarray(values, dtype=np.float64)
    missing = np.isnan(v)
    if np.isinf(v).any():
        raise WireError("infinite value in a per-second array", "non_finite")
    scaled = v * 10.0 ** (-exp) if exp < 0 else v / 10.0**exp
    with np.errstate(invalid="ignore"):
        too_big = np.abs(scaled) > INT32_MAX
    if np.any(too_big & ~missing):
        raise WireError(f"value does not fit int32 units of 1e{exp}", "encode")
    units = np.where(missing, 0.0, np.rint(scaled)).astype(np.int64)
    return units, missing


def to_physical(units: I64, missing: BOOL, exp: int) -> F64:
    """Units of 10^exp back to float64, NaN where missing. Division by the exact integer
    10^-exp gives the double nearest to the decimal value (0.01 V steps print as such)."""
    out = units / float(10 ** (-exp)) if exp < 0 else units * float(10**exp)
    out = np.asarray(out, dtype=np.float64)
    out[missing] = math.nan
    return out


def pack_values(values: F64, exp: int) -> list[object]:
    """Quantise and pack a float array (NaN = missing)."""
    units, missing = quantise(values, exp)
    return pack_units(units, missing, exp)


def unpack_values(packed: list[object], n: int) -> F64:
    """Float64 values of a packed array, NaN where missing."""
    exp = int(packed[0])  # type: ignore[call-overload]
    units, missing = unpack_units(packed, n)
    return to_physical(units, missing, exp)
