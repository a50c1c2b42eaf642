"""The compiled row kernel: one row of logits to a kept set and a drawn token, in numba.

This is the fast path of ``core``; the numpy modules (``full``, ``row``, ``batch``) stay the
reference it is held to, and the path used when numba is missing. Per row it makes one fused
pass over the vocabulary, chunk by chunk while the chunk is in L1: block maxima (for the
candidate cut), the running maximum, and the exp-sum and entropy sums of the raw softmax, all
vectorised (AVX2/AVX-512 where the CPU has it). Then it cuts the row to the candidates of the
chain's first ranking stage (top_k, greedy, min_p), exactly as ``full`` does, and applies the
remaining stages to those few candidates with the exact rules of DESIGN.md section 1: float64
working logits, ties to the lower id, prefixes in the order of a stable sort.

A row the kernel does not decide (NaN or +inf entries, nothing left, a chain whose first
truncation needs the whole renormalised distribution) comes back with a status, and ``core``
decides it on the numpy path instead.

Everything here is a pure function of its arguments; numba compiles it once per process, or
loads it from its on-disk cache (``cache=True``).
"""

from __future__ import annotations

import math
from typing import Any

import numpy as np
from llvmlite import ir
from numba import njit, types
from numba.extending import intrinsic

# --- status of a row --------------------------------------------------------------------------

DECIDED = 0
INVALID = 1  # NaN or +inf entries, or no finite entry: the numpy path decides (fallback, 422)
EMPTY = 2  # the chain left nothing: the numpy path applies the fallback

# --- stage codes (the order of chain.METHODS does not matter; these are the kernel's own) --------

TEMPERATURE = 0
EDIT = 1
TOP_K = 2
TOP_P = 3
TYPICAL = 4
MIN_P = 5
EPSILON = 6
ETA = 7
GREEDY = 8
# An edit stage whose edits come from the row's history (repetition and occurrence penalties):
# its one entry in the edit arrays describes it (token: the window, or -1 for the whole
# history; kind: PENALISE or TALLY; value: the factor or the per-use amount), and its stage
# parameter is the occurrence penalty's one-off amount.
HISTORY_EDIT = 9

# Edit kinds: how one token's working logit changes.
PENALISE = 0  # repetition penalty: v / f if v > 0 else v * f
SHIFT = 1  # v + delta
REMOVE = 2  # -inf
TALLY = 3  # only in a HISTORY_EDIT description: v - (per_use * count + present)

# Block length of the block maxima; a chunk is several blocks and stays in L1 while it is used.
BLOCK = 256
CHUNK = 1024

_JIT: dict[str, Any] = {"nogil": True, "cache": True, "error_model": "numpy"}
# Reassociation lets LLVM vectorise the sums; no flag that assumes finite values, because -inf
# entries are legal and NaN must be detected.
_VECTOR_MATH = {"contract", "reassoc", "nsz", "arcp"}


# --- LLVM operations numba does not expose in a form that vectorises ---------------------------


@intrinsic
def _bits_to_f32(typingctx: Any, v: Any) -> Any:
    def codegen(context: Any, builder: Any, signature: Any, args: Any) -> Any:
        return builder.bitcast(args[0], ir.FloatType())

    return types.float32(types.int32), codegen


def _f32_binary(llvm_name: str) -> Any:
    """Code generation for a call of the float32 LLVM intrinsic ``llvm_name`` on two operands."""

    def codegen(context: Any, builder: Any, signature: Any, args: Any) -> Any:
        f = ir.FloatType()
        fn = builder.module.declare_intrinsic(llvm_name, [f], ir.FunctionType(f, [f, f]))
        return builder.call(fn, args)

    return codegen


@intrinsic
def _max_f32(typingctx: Any, a: Any, b: Any) -> Any:
    """IEEE maxNum: the larger, and the other operand when one is NaN (NaN never wins)."""
    return types.float32(types.float32, types.float32), _f32_binary("llvm.maxnum")


@intrinsic
def _min_f32(typingctx: Any, a: Any, b: Any) -> Any:
    """IEEE minNum: the smaller, and the other operand when one is NaN."""
    return types.float32(types.float32, types.float32), _f32_binary("llvm.minnum")


@intrinsic
def _floor_at(typingctx: Any, v: Any, low: Any) -> Any:
    """``low`` if ``v < low`` else ``v``: a NaN stays NaN, so it reaches the sums."""

    def codegen(context: Any, builder: Any, signature: Any, args: Any) -> Any:
        below = builder.fcmp_ordered("<", args[0], args[1])
        return builder.select(below, args[1], args[0])

    return types.float32(types.float32, types.float32), codegen


# Entries one vector compare covers: a 512-bit vector (LLVM splits it on narrower CPUs).
LANES = 16


@intrinsic
def _at_least_mask(typingctx: Any, values: Any, start: Any, floor: Any) -> Any:
    """Bit i set when ``values[start + i] >= floor``, for i < LANES: one vector load, compare
    and mask move (a NaN compares false). ``values`` is contiguous float32 and holds the LANES
    entries; the caller checks the bounds."""
    if not (
        isinstance(values, types.Array)
        and values.dtype == types.float32
        and values.ndim == 1
        and values.layout == "C"
    ):
        return None

    def codegen(context: Any, builder: Any, signature: Any, args: Any) -> Any:
        array = context.make_array(signature.args[0])(context, builder, args[0])
        vector = ir.VectorType(ir.FloatType(), LANES)
        at = builder.bitcast(builder.gep(array.data, [args[1]]), vector.as_pointer())
        loaded = builder.load(at, align=4)
        first = builder.insert_element(
            ir.Constant(vector, ir.Undefined), args[2], ir.Constant(ir.IntType(32), 0)
        )
        spread = builder.shuffle_vector(
            first,
            ir.Constant(vector, ir.Undefined),
            ir.Constant(ir.VectorType(ir.IntType(32), LANES), [0] * LANES),
        )
        hits = builder.fcmp_ordered(">=", loaded, spread)
        return builder.zext(builder.bitcast(hits, ir.IntType(LANES)), ir.IntType(64))

    return types.uint64(values, types.intp, types.float32), codegen


@intrinsic
def _lowest_bit(typingctx: Any, x: Any) -> Any:
    """The position of the lowest set bit of a non-zero uint64 (one tzcnt)."""

    def codegen(context: Any, builder: Any, signature: Any, args: Any) -> Any:
        i64 = ir.IntType(64)
        fn = builder.module.declare_intrinsic(
            "llvm.cttz", [i64], ir.FunctionType(i64, [i64, ir.IntType(1)])
        )
        return builder.call(fn, [args[0], ir.Constant(ir.IntType(1), 1)])

    return types.uint64(types.uint64), codegen


# --- the fused pass -----------------------------------------------------------------------------

_LOG2E = np.float32(1.4426950408889634)
_LN2_HI = np.float32(0.693359375)
_LN2_LO = np.float32(-2.12194440e-4)
_LOWEST = np.float32(np.finfo(np.float32).min)
# Differences are clamped here before the exp: it keeps the exponent arithmetic in range, and
# every result a normal float32 (e^-87 is 1.6e-38). Below about -87.3 the results are
# subnormal, which costs the CPU about a hundred cycles an operation: with -87.5, a row masked
# with -inf but for a few ids took ten times as long to scan as a plain one. What the clamp adds
# to the sums (at most 1.6e-38 an entry, against the top entry's 1) is far below their rounding.
_EXP_FLOOR = np.float32(-87.0)


@njit(inline="always", fastmath=_VECTOR_MATH)
def _exp_nonpositive(d: Any) -> Any:
    """exp(d) in float32 for -87 <= d <= 0 (relative error about 2e-7; NaN stays NaN).

    Cody-Waite range reduction and the minimax polynomial of the Cephes library's expf: plain
    arithmetic that LLVM vectorises, where a call to libm's expf would not be.
    """
    a = -d * _LOG2E + np.float32(0.5)
    n = -np.int32(a)  # a >= 0: truncation is rounding to nearest
    nf = np.float32(n)
    r = d - nf * _LN2_HI
    r = r - nf * _LN2_LO
    p = np.float32(1.9875691500e-4)
    p = p * r + np.float32(1.3981999507e-3)
    p = p * r + np.float32(8.3334519073e-3)
    p = p * r + np.float32(4.1665795894e-2)
    p = p * r + np.float32(1.6666665459e-1)
    p = p * r + np.float32(5.0000001201e-1)
    y = p * r * r + r + np.float32(1.0)
    return y * _bits_to_f32((n + np.int32(127)) << 23)


@njit(inline="always", fastmath=_VECTOR_MATH)
def _chunk_sums(chunk: Any, top: Any) -> tuple[float, float]:
    """(sum e, sum e * d) over one chunk, e = exp(d), d = x - top <= 0."""
    z = np.float32(0.0)
    s = np.float32(0.0)
    for i in range(chunk.size):
        d = _floor_at(chunk[i] - top, _EXP_FLOOR)
        e = _exp_nonpositive(d)
        z += e
        s += e * d
    return float(z), float(s)


@njit(fastmath=_VECTOR_MATH, **_JIT)
def scan(row: Any, block_max: Any) -> tuple[float, float, float]:
    """One pass over ``row``: fills ``block_max`` (the maximum of each BLOCK entries) and returns
    (top, log normaliser, entropy) of the raw softmax. A row with a NaN or +inf entry gives a
    NaN normaliser; a row with no finite entry gives top = -inf.

    The maximum is kept as a running one: when a chunk raises it, the sums so far are rescaled
    (z' = k z, s' = k (s + delta z), k = exp(delta), delta = old - new top), so every chunk is
    read once while it is in L1.
    """
    size = row.size
    top = np.float32(-np.inf)
    z = 0.0
    s = 0.0
    for lo in range(0, size, CHUNK):
        hi = min(lo + CHUNK, size)
        chunk_top = np.float32(-np.inf)
        for b in range(lo // BLOCK, (hi + BLOCK - 1) // BLOCK):
            block = row[b * BLOCK : min(b * BLOCK + BLOCK, hi)]
            m = np.float32(-np.inf)
            for i in range(block.size):
                m = _max_f32(m, block[i])
            block_max[b] = m
            chunk_top = _max_f32(chunk_top, m)
        if chunk_top > top:
            if top > -np.inf:
                delta = float(top) - float(chunk_top)
                k = math.exp(delta)
                s = k * (s + delta * z)
                z = k * z
            top = chunk_top
        if top == -np.inf:
            continue  # every entry so far is -inf: nothing to add
        dz, ds = _chunk_sums(row[lo:hi], top)
        z += dz
        s += ds
    if top == -np.inf:
        return -math.inf, math.nan, math.nan
    if top == np.inf:
        return math.inf, math.nan, math.nan
    log_z = math.log(z)
    return float(top), float(top) + log_z, log_z - s / z


# --- cutting a row to candidates ------------------------------------------------------------------


# Histogram bins of the block maxima (a few hundred to a thousand of them).
_BINS = 64


@njit(**_JIT)
def _block_floor(block_max: Any, m: int) -> Any:
    """A value that at least ``m`` finite block maxima reach, close to the m-th largest: the
    least value in the top bins of a histogram of the block maxima (-inf when there are no more
    than m finite ones). Counting is exact, so the bound holds whatever the rounding of a bin."""
    lo, hi, finite = np.inf, -np.inf, 0
    for v in block_max:
        if v > -np.inf:
            finite += 1
            lo, hi = min(lo, float(v)), max(hi, float(v))
    if finite <= m:
        return np.float32(-np.inf)
    width = (hi - lo) / _BINS
    if width == 0.0:
        return np.float32(lo)
    counts = np.zeros(_BINS, np.int64)
    least = np.full(_BINS, np.inf)
    for v in block_max:
        if v > -np.inf:
            k = min(int((float(v) - lo) / width), _BINS - 1)
            counts[k] += 1
            least[k] = min(least[k], float(v))
    total, floor = 0, np.inf
    for k in range(_BINS - 1, -1, -1):
        total += counts[k]
        floor = min(floor, least[k])
        if total >= m:
            break
    return np.float32(floor)


@njit(fastmath=_VECTOR_MATH, **_JIT)
def _count_at_least(values: Any, floor: Any) -> int:
    count = 0
    for i in range(values.size):
        count += values[i] >= floor
    return count


@njit(**_JIT)
def _count_floor(values: Any, top: Any, m: int) -> Any:
    """A float32 value that at least ``m`` of ``values`` reach and not many more (about 2m),
    found by counting, a vectorised pass each: steps down from ``top`` (the largest value)
    that double until m are reached (or the least finite value is), then halving between the
    last two steps. -inf when no more than m are finite: every finite one is then wanted, and
    the gathering visits only blocks that hold one (a row masked with -inf but for a few ids).
    The counts are the very comparisons ``positions_at_least`` makes, so the bound is exact."""
    finite, lowest = _finite_count_and_min(values)
    if finite <= m:
        return np.float32(-np.inf)
    least = np.float32(lowest)
    if _count_at_least(values, np.nextafter(least, np.float32(np.inf))) < m:
        return least  # the m-th largest is the least value itself (a row masked with -1e9)
    above, step = float(top), 1.0
    below = np.float32(above - step)
    count = _count_at_least(values, below)
    while count < m:
        above, step = float(below), step * 2.0
        if float(top) - step <= lowest:
            below, count = np.float32(lowest), finite
            break
        below = np.float32(float(top) - step)
        count = _count_at_least(values, below)
    for _ in range(12):
        if count <= 2 * m + 16:
            break
        middle = np.float32(0.5 * (float(below) + above))
        if middle <= below or middle >= above:
            break  # no float32 between them: ties at the floor
        more = _count_at_least(values, middle)
        if more >= m:
            below, count = middle, more
        else:
            above = float(middle)
    return below


@njit(fastmath=_VECTOR_MATH, **_JIT)
def _finite_count_and_min(values: Any) -> tuple[int, float]:
    """How many of ``values`` are finite (no NaN or +inf reaches here), and the least of those.
    Two loops, because LLVM vectorises each alone but not the two fused (4 us against 0.5 us
    for 4096 entries), and minNum, because Python's ``min`` does not vectorise either."""
    count = 0
    for i in range(values.size):
        count += values[i] > -np.inf
    lowest = np.float32(np.inf)
    for i in range(values.size):
        v = values[i]
        lowest = _min_f32(lowest, v if v > -np.inf else np.float32(np.inf))
    return count, float(lowest)


@njit(**_JIT)
def top_positions(row: Any, block_max: Any, m: int) -> Any:
    """Positions (ascending) of the ``m`` largest finite entries, ties to the lower position.

    Any value t that at least m block maxima reach is a lower bound of the m-th largest entry
    (m blocks hold an entry >= t), so only blocks whose maximum reaches t can hold the answer:
    with t near the m-th largest block maximum, about m blocks. When there are no more blocks
    than m (a small vocabulary, or a large m), or the blocks found still hold many more than m
    entries (a flat row), counting the entries themselves gives the bound instead.
    """
    floor = _block_floor(block_max, m)
    if floor == -np.inf:
        floor = _count_floor(row, block_max.max(), m)
    found = positions_at_least(row, block_max, floor)
    if found.size <= m:
        return found
    values = row[found]
    if found.size > 4 * m + 64:
        floor = _count_floor(values, values.max(), m)
        near = values >= floor
        found, values = found[near], values[near]
        if _count_at_least(values, np.nextafter(floor, np.float32(np.inf))) < m:
            # The floor is the m-th largest itself, shared by many: no selection needed.
            return found[_largest_from(values, m, floor)]
    return found[_largest(values, m)]


@njit(**_JIT)
def _largest(values: Any, m: int) -> Any:
    """Mask of the ``m`` largest of ``values`` (m < size), ties at the m-th value to the lower
    index: what a stable sort by decreasing value would put first, without sorting. One
    selection finds the m-th value; everything above it is in, then equal ones in index order."""
    return _largest_from(values, m, _kth_largest(values, m))


@njit(fastmath=_VECTOR_MATH, **_JIT)
def _count_keys_at_least(keys: Any, floor: Any) -> int:
    count = 0
    for i in range(keys.size):
        count += keys[i] >= floor
    return count


@njit(**_JIT)
def _kth_largest(values: Any, m: int) -> Any:
    """The m-th largest of ``values`` (1 <= m <= size; no NaN among them), by counting: the
    values as unsigned integers in the same order (sign bit flipped for positives, every bit
    for negatives), and the m-th largest key found bit by bit from the top, each bit one
    vectorised count. For a few hundred candidates this takes a third of a selection's time
    (whose every comparison is a branch the CPU cannot predict).

    float64 values are first rounded to float32, which keeps their order (rounding is
    monotone): the m-th largest rounded value takes half the bits at twice the lanes, and
    the answer is among the few values that round to it."""
    if values.itemsize == 4:
        return _kth_largest_f32(values, m)
    narrow = values.astype(np.float32)
    rounded = _kth_largest_f32(narrow, m)
    above = 0
    for i in range(narrow.size):
        above += narrow[i] > rounded
    tied = values[narrow == rounded]
    if tied.size == 1:
        return tied[0]
    bits = tied.view(np.int64)
    keys = np.empty(tied.size, np.uint64)
    top = np.uint64(1) << np.uint64(63)
    for i in range(tied.size):
        v = bits[i]
        keys[i] = np.uint64(v) | top if v >= 0 else ~np.uint64(v)
    found = np.uint64(0)
    for b in range(63, -1, -1):
        trial = found | (np.uint64(1) << np.uint64(b))
        if _count_keys_at_least(keys, trial) >= m - above:
            found = trial
    return tied[np.flatnonzero(keys == found)[0]]


@njit(**_JIT)
def _kth_largest_f32(values: Any, m: int) -> Any:
    """``_kth_largest`` of float32 values."""
    bits = np.ascontiguousarray(values).view(np.int32)
    keys = np.empty(values.size, np.uint32)
    for i in range(values.size):
        v = bits[i]
        keys[i] = np.uint32(v) | np.uint32(0x80000000) if v >= 0 else ~np.uint32(v)
    found = np.uint32(0)
    for b in range(31, -1, -1):
        trial = found | np.uint32(1 << b)
        if _count_keys_at_least(keys, trial) >= m:
            found = trial
    return values[np.flatnonzero(keys == found)[0]]


@njit(**_JIT)
def _largest_from(values: Any, m: int, kth: Any) -> Any:
    """The mask of ``_largest`` when the m-th largest value ``kth`` is known."""
    keep = values > kth
    need = m - np.count_nonzero(keep)
    for i in range(values.size):
        if need == 0:
            break
        if values[i] == kth:
            keep[i] = True
            need -= 1
    return keep


@njit(**_JIT)
def positions_at_least(row: Any, block_max: Any, floor: Any) -> Any:
    """Positions (ascending) of the finite entries >= ``floor``, visiting only the blocks whose
    maximum reaches it: LANES entries at a time, one vector compare giving a bit mask whose set
    bits are read off lowest first (a quarter of the time of a compare and a store per entry).
    """
    floor = max(floor, _LOWEST)  # -inf entries are never kept
    blocks = np.flatnonzero(block_max >= floor)
    found = np.empty(blocks.size * BLOCK, np.int64)
    count = 0
    for b in blocks:
        lo = b * BLOCK
        hi = min(lo + BLOCK, row.size)
        while lo + LANES <= hi:
            mask = _at_least_mask(row, lo, floor)
            while mask:
                found[count] = lo + np.int64(_lowest_bit(mask))
                count += 1
                mask &= mask - np.uint64(1)
            lo += LANES
        for i in range(lo, hi):  # the row's last few entries
            found[count] = i
            count += row[i] >= floor
    return found[:count]


# --- the rules on the candidates (1-D, like ``row``) -----------------------------------------


@njit(**_JIT)
def softmax(w: Any) -> Any:
    """exp(w - max) / their sum, as ``np.exp(w - w.max())`` and its ``/ e.sum()`` compute it,
    in loops that make one array instead of three."""
    top = w.max()
    e = np.empty(w.size)
    total = 0.0
    for i in range(w.size):
        e[i] = math.exp(w[i] - top)
        total += e[i]
    for i in range(w.size):
        e[i] /= total
    return e


@njit(**_JIT)
def mass(raw: Any, ids: Any, log_norm: float) -> float:
    """Raw model mass on ``ids``: the sum of exp(raw - log normaliser), in float64."""
    total = 0.0
    for i in ids:
        total += math.exp(float(raw[i]) - log_norm)
    return total


@njit(**_JIT)
def _most_probable(ids: Any, w: Any, m: int) -> tuple[Any, Any]:
    """The ``m`` most probable (ties to the lower id), in id order."""
    if ids.size <= m:
        return ids, w
    keep = _largest(w, m)
    return ids[keep], w[keep]


@njit(**_JIT)
def _keep(ids: Any, w: Any, keep: Any, min_keep: int) -> tuple[Any, Any]:
    """Keep where ``keep``, or the ``min_keep`` most probable if that is fewer."""
    if np.count_nonzero(keep) >= min_keep:
        return ids[keep], w[keep]
    return _most_probable(ids, w, min_keep)


# Below this many keys numba's merge sort is quicker than the radix passes and their tables.
_RADIX_FROM = 64
_SIGN = np.uint64(1) << np.uint64(63)
_HIGH = np.uint64(32)
_BYTE = np.uint64(255)


@njit(**_JIT)
def stable_order(key: Any) -> Any:
    """Positions of float64 ``key`` in (key asc, position asc) order: ``np.argsort(key,
    kind="stable")``, NaN last included, and -0.0 equal to 0.0.

    A merge sort's comparisons are branches the CPU cannot predict: for the few hundred
    candidates of a typical set it took 8 us, most of that stage. Here the keys become
    unsigned integers in the same order, and a least-significant-digit radix sort (stable by
    construction) orders them by their top 32 bits in at most four byte passes, skipping a byte
    every key shares; keys that share their top 32 bits (a relative gap under about 1e-6) are
    then put in order by an insertion sort, bounded: past ``n`` moves the merge sort is cheaper
    and runs instead."""
    n = key.size
    if n < _RADIX_FROM:
        return np.argsort(key, kind="mergesort")
    keys = np.empty(n, np.uint64)
    bits = np.ascontiguousarray(key).view(np.int64)
    for i in range(n):
        v = key[i]
        if v != v:
            return np.argsort(key, kind="mergesort")
        b = bits[i] if v != 0.0 else np.int64(0)
        keys[i] = np.uint64(b) | _SIGN if b >= 0 else ~np.uint64(b)
    counts = np.zeros((4, 256), np.int64)
    for i in range(n):
        k = keys[i] >> _HIGH
        counts[0, k & _BYTE] += 1
        counts[1, (k >> np.uint64(8)) & _BYTE] += 1
        counts[2, (k >> np.uint64(16)) & _BYTE] += 1
        counts[3, k >> np.uint64(24)] += 1
    order = np.arange(n)
    spare = np.empty(n, np.int64)
    starts = np.empty(256, np.int64)
    for d in range(4):
        shift = np.uint64(32 + 8 * d)
        if counts[d, (keys[0] >> shift) & _BYTE] == n:
            continue
        total = 0
        for b in range(256):
            starts[b] = total
            total += counts[d, b]
        for j in range(n):
            i = order[j]
            b = (keys[i] >> shift) & _BYTE
            spare[starts[b]] = i
            starts[b] += 1
        order, spare = spare, order
    moves = 0
    for j in range(1, n):
        i = order[j]
        k = keys[i]
        h = j
        while h > 0 and keys[order[h - 1]] > k and (keys[order[h - 1]] >> _HIGH) == (k >> _HIGH):
            order[h] = order[h - 1]
            h -= 1
        order[h] = i
        moves += j - h
        if moves > n:
            return np.argsort(key, kind="mergesort")
    return order


@njit(**_JIT)
def _prefix(key: Any, mass: Any, target: float) -> Any:
    """Mask of the shortest prefix in (key asc, position asc) order with mass >= target (all
    of it when no prefix reaches it)."""
    order = stable_order(key)
    keep = np.ones(key.size, np.bool_)
    total = 0.0
    for j in range(order.size):
        total += mass[order[j]]
        if total >= target:
            keep[:] = False
            keep[order[: j + 1]] = True
            break
    return keep


@njit(**_JIT)
def _typical_set(w: Any, target: float) -> Any:
    """Mask of the typical set (Meister et al. 2023) of working logits ``w``: the shortest
    prefix, by distance of -log p from the entropy, with mass >= target. The operations of
    ``_log_softmax``, ``np.exp`` and the entropy's sum in their order, in three loops: every
    array expression was a loop and a temporary of its own, and a prompt step meets them all
    with cold caches."""
    n = w.size
    top = w.max()
    z = 0.0
    for i in range(n):
        z += math.exp(w[i] - top)
    log_z = math.log(z)
    logp = np.empty(n)
    p = np.empty(n)
    plogp = 0.0
    for i in range(n):
        logp[i] = (w[i] - top) - log_z
        p[i] = math.exp(logp[i])
        plogp += p[i] * logp[i]
    entropy = -plogp
    for i in range(n):
        logp[i] = abs(logp[i] + entropy)  # now the distance from the entropy
    return _prefix(logp, p, target)


@njit(**_JIT)
def _log_softmax(w: Any) -> Any:
    shifted = w - w.max()
    return shifted - math.log(np.exp(shifted).sum())


@njit(**_JIT)
def _apply_edits(ids: Any, w: Any, tokens: Any, kinds: Any, values: Any) -> tuple[Any, Any]:
    w = w.copy()
    for j in range(tokens.size):
        pos = np.searchsorted(ids, tokens[j])
        if pos >= ids.size or ids[pos] != tokens[j] or w[pos] == -np.inf:
            continue
        v = w[pos]
        if kinds[j] == PENALISE:
            w[pos] = v / values[j] if v > 0 else v * values[j]
        elif kinds[j] == SHIFT:
            w[pos] = v + values[j]
        else:
            w[pos] = -np.inf
    alive = w > -np.inf
    return ids[alive], w[alive]


@njit(**_JIT)
def apply_stages(ids: Any, w: Any, stages: Any, history: Any, min_keep: int) -> tuple[Any, Any]:
    """The ``stages`` (see ``_unpack``) on candidates (ids ascending, float64 working logits)."""
    codes, params = stages[0], stages[1]
    for j in range(codes.size):
        if ids.size == 0:
            break
        code = codes[j]
        x = params[j]
        if code == TEMPERATURE:
            w = w / x
        elif code in (EDIT, HISTORY_EDIT):
            tokens, kinds, values = _stage_edits(j, stages, history)
            ids, w = _apply_edits(ids, w, tokens, kinds, values)
        elif code == TOP_K:
            ids, w = _most_probable(ids, w, max(int(x), min_keep))
        elif code == GREEDY:
            at = np.argmax(w)  # the first maximum: the lowest id among ties
            ids, w = ids[at : at + 1], w[at : at + 1]
        elif code == TOP_P:
            if x < 1.0:
                p = softmax(w)
                ids, w = _keep(ids, w, _prefix(-p, p, x), min_keep)
        elif code == TYPICAL:
            if x < 1.0:
                ids, w = _keep(ids, w, _typical_set(w, x), min_keep)
        elif code == MIN_P:
            # p_i >= m * p_max  <=>  exp(w_i - w_max) >= m: the normaliser cancels.
            ids, w = _keep(ids, w, np.exp(w - w.max()) >= x, min_keep)
        elif code == EPSILON:
            ids, w = _keep(ids, w, softmax(w) >= x, min_keep)
        elif code == ETA:
            logp = _log_softmax(w)
            p = np.exp(logp)
            threshold = min(x, math.sqrt(x) * math.exp((p * logp).sum()))
            ids, w = _keep(ids, w, p >= threshold, min_keep)
    return ids, w


@njit(**_JIT)
def _stage_edits(j: int, stages: Any, history: Any) -> tuple[Any, Any, Any]:
    """(tokens ascending, kinds, values) of edit stage ``j``: its packed edits, or for a
    HISTORY_EDIT those made from ``history`` (the arrays form of ``batch.edits_for``, with the
    same floating-point operations: counts are exact in float64)."""
    codes, params, edit_from, edit_tokens, edit_kinds, edit_values = stages
    lo, hi = edit_from[j], edit_from[j + 1]
    if codes[j] != HISTORY_EDIT:
        return edit_tokens[lo:hi], edit_kinds[lo:hi], edit_values[lo:hi]
    window = edit_tokens[lo]
    recent = history if window < 0 else history[max(0, history.size - window) :]
    tokens, counts = _tally(recent)
    if edit_kinds[lo] == PENALISE:
        factors = np.full(tokens.size, edit_values[lo])
        return tokens, np.full(tokens.size, PENALISE, np.int64), factors
    per_use, present = edit_values[lo], params[j]
    shifts = np.empty(tokens.size)
    for i in range(tokens.size):
        shifts[i] = -(per_use * counts[i] + present)
    return tokens, np.full(tokens.size, SHIFT, np.int64), shifts


@njit(**_JIT)
def _tally(ids: Any) -> tuple[Any, Any]:
    """The distinct ``ids`` ascending, and how often each occurs."""
    ordered = np.sort(ids)
    tokens = np.empty(ordered.size, np.int64)
    counts = np.empty(ordered.size, np.int64)
    n = 0
    for i in range(ordered.size):
        if n > 0 and tokens[n - 1] == ordered[i]:
            counts[n - 1] += 1
        else:
            tokens[n] = ordered[i]
            counts[n] = 1
            n += 1
    return tokens[:n], counts[:n]


@njit(**_JIT)
def _edited(v: float, kind: int, value: float) -> float:
    if kind == PENALISE:
        return v / value if v > 0 else v * value
    if kind == SHIFT:
        return v + value
    return -np.inf


@njit(**_JIT)
def _working(raw: Any, ids: Any, temp: float, edited: Any, values: Any) -> Any:
    """Working logits of ``ids`` (ascending): raw / temperature, edited ids (ascending) the
    values they were edited to; one pass, both walked together."""
    w = np.empty(ids.size)
    k = 0
    for i in range(ids.size):
        token = ids[i]
        while k < edited.size and edited[k] < token:
            k += 1
        if k < edited.size and edited[k] == token:
            w[i] = values[k]
        else:
            w[i] = float(raw[token]) / temp
    return w


@njit(**_JIT)
def _merge_edits(
    raw: Any, temp: float, edited: Any, values: Any, tokens: Any, kinds: Any, amounts: Any
) -> tuple[Any, Any]:
    """``edited``/``values`` (ascending ids, their working logits) after one stage's edits
    (``tokens`` ascending: ``compiled`` packs bans and biases so, and ``_tally`` makes a
    penalty's so): an id edited before is edited again from its value, a new one from its raw
    logit over ``temp``."""
    out_ids = np.empty(edited.size + tokens.size, np.int64)
    out_values = np.empty(out_ids.size, np.float64)
    i = t = n = 0
    while i < edited.size or t < tokens.size:
        if t == tokens.size or (i < edited.size and edited[i] < tokens[t]):
            out_ids[n], out_values[n] = edited[i], values[i]
            i += 1
            n += 1
        elif i < edited.size and edited[i] == tokens[t]:
            out_ids[n] = edited[i]
            out_values[n] = _edited(values[i], kinds[t], amounts[t])
            i += 1
            t += 1
            n += 1
        else:
            out_ids[n] = tokens[t]
            out_values[n] = _edited(float(raw[tokens[t]]) / temp, kinds[t], amounts[t])
            t += 1
            n += 1
    return out_ids[:n], out_values[:n]


@njit(**_JIT)
def _union(a: Any, b: Any) -> Any:
    """The ascending union of two ascending arrays without repeats (a merge: numba's
    ``np.unique`` sorts, at several times the cost of the ranking it follows)."""
    if b.size == 0:
        return a
    out = np.empty(a.size + b.size, np.int64)
    i = j = n = 0
    while i < a.size and j < b.size:
        if a[i] < b[j]:
            out[n] = a[i]
            i += 1
        elif b[j] < a[i]:
            out[n] = b[j]
            j += 1
        else:
            out[n] = a[i]
            i += 1
            j += 1
        n += 1
    while i < a.size:
        out[n] = a[i]
        i += 1
        n += 1
    while j < b.size:
        out[n] = b[j]
        j += 1
        n += 1
    return out[:n]


@njit(**_JIT)
def _top_unedited(raw: Any, block_max: Any, m: int, edited: Any) -> Any:
    """Positions (ascending) of the k largest raw entries, for the least k found that leaves
    at least ``m`` of them outside ``edited`` (ascending): these hold the m highest working
    logits among the unedited ids, since a positive temperature keeps the raw order. When there
    are more edited ids than m, growing k by the edited ids found (at most m + len(edited) in
    all) keeps a long ban from turning into as many candidates."""
    if edited.size <= m:  # a few more candidates cost less than ranking again
        return top_positions(raw, block_max, m + edited.size)
    k = m
    while True:
        top = top_positions(raw, block_max, k)
        found = _common(top, edited)
        if top.size - found >= m or top.size < k or k >= m + edited.size:
            return top
        k = min(m + found, m + edited.size)


@njit(**_JIT)
def _common(a: Any, b: Any) -> int:
    """How many ids two ascending arrays share."""
    i = j = n = 0
    while i < a.size and j < b.size:
        if a[i] < b[j]:
            i += 1
        elif b[j] < a[i]:
            j += 1
        else:
            n += 1
            i += 1
            j += 1
    return n


@njit(**_JIT)
def cut(
    raw: Any,
    block_max: Any,
    stages: Any,
    history: Any,
    first_code: int,
    first_param: float,
    min_keep: int,
) -> tuple[Any, Any]:
    """The lazy prefix of ``full.narrow_row`` (temperatures and edits before the first
    truncation, kept as a divisor and a few edited ids) and its cut to the candidates of the
    first truncation (top_k, greedy or min_p): (candidate ids ascending, working logits)."""
    codes, params = stages[0], stages[1]
    temp = 1.0
    # The edited ids so far, ascending, with their working logits: each edit stage is merged
    # in, so a long ban followed by a penalty costs their lengths, not their product.
    edited = np.empty(0, np.int64)
    values = np.empty(0, np.float64)
    for j in range(codes.size):
        if codes[j] == TEMPERATURE:
            temp *= params[j]
            values /= params[j]
            continue
        tokens, kinds, amounts = _stage_edits(j, stages, history)
        edited, values = _merge_edits(raw, temp, edited, values, tokens, kinds, amounts)
    count = edited.size
    # Edited ids that can still be chosen; a banned one cannot, however high its raw logit.
    extra = edited[values > -np.inf]
    if first_code == MIN_P:
        head = _union(_top_unedited(raw, block_max, 1, edited), extra)
        w_max = _working(raw, head, temp, edited, values).max()
        ids = head
        if w_max > -np.inf:
            # A generous margin on the float32 comparison; the exact test runs afterwards.
            floor = (w_max + math.log(first_param)) * temp
            floor -= 1e-4 * (abs(floor) + 1.0)
            ids = _union(positions_at_least(raw, block_max, np.float32(floor)), extra)
        ids = _union(ids, _union(_top_unedited(raw, block_max, min_keep, edited), extra))
    else:
        m = 1 if first_code == GREEDY else max(int(first_param), min_keep)
        ids = _union(_top_unedited(raw, block_max, m, edited), extra)
    w = _working(raw, ids, temp, edited, values)
    if count:  # raw candidates are finite; only an edit (a ban) can remove one
        alive = w > -np.inf
        ids, w = ids[alive], w[alive]
    return ids, w


@njit(**_JIT)
def draw(probs: Any, u: float) -> int:
    """The first position whose running sum of ``probs`` exceeds u times the whole sum: the
    inverse CDF of ``core``, with the same sequential running sum."""
    total = 0.0
    for j in range(probs.size):
        total += probs[j]
    target = u * total
    cum = 0.0
    for j in range(probs.size):
        cum += probs[j]
        if cum > target:
            return j
    return probs.size - 1


# --- whole rows -------------------------------------------------------------------------------
#
# A chain reaches the kernel packed into one int64 and one float64 array, once per chain
# (``compiled._pack``; a penalty's edits are made here, from each row's history): numba's
# dispatcher types every argument on every call, and a dozen small arrays cost more to type
# than a row's candidate rules cost to run.
#
#   ints:   min_keep, first_code, n_prefix, n_prefix_edits, n_tail, n_tail_edits,
#           prefix codes, prefix edit_from, prefix edit tokens, prefix edit kinds,
#           tail codes, tail edit_from, tail edit tokens, tail edit kinds
#   floats: first_param, prefix params, prefix edit values, tail params, tail edit values

HEAD = 6


@njit(**_JIT)
def _unpack(ints: Any, floats: Any) -> Any:
    """The prefix's and the tail's stages, each a tuple (codes, params, edit_from, edit tokens,
    edit kinds, edit values): edit stage j changes ``tokens[edit_from[j]:edit_from[j + 1]]``,
    or describes a HISTORY_EDIT there."""
    n_pre, e_pre, n_tail, e_tail = ints[2], ints[3], ints[4], ints[5]
    i, f = HEAD, 1
    codes = ints[i : i + n_pre]
    i += n_pre
    edit_from = ints[i : i + n_pre + 1]
    i += n_pre + 1
    tokens = ints[i : i + e_pre]
    kinds = ints[i + e_pre : i + 2 * e_pre]
    i += 2 * e_pre
    params = floats[f : f + n_pre]
    values = floats[f + n_pre : f + n_pre + e_pre]
    f += n_pre + e_pre
    prefix = (codes, params, edit_from, tokens, kinds, values)
    codes = ints[i : i + n_tail]
    i += n_tail
    edit_from = ints[i : i + n_tail + 1]
    i += n_tail + 1
    tokens = ints[i : i + e_tail]
    kinds = ints[i + e_tail : i + 2 * e_tail]
    params = floats[f : f + n_tail]
    values = floats[f + n_tail : f + n_tail + e_tail]
    tail = (codes, params, edit_from, tokens, kinds, values)
    return prefix, tail


@njit(**_JIT)
def decide_row(raw: Any, ints: Any, floats: Any, history: Any, u: float) -> Any:
    """One row, start to end: (status, kept ids, their probabilities, token, its probability,
    kept mass, entropy, raw log-probability of the token). A status other than DECIDED leaves
    the rest meaningless."""
    prefix, tail = _unpack(ints, floats)
    min_keep, first_code, first_param = ints[0], ints[1], floats[0]
    block_max = np.empty((raw.size + BLOCK - 1) // BLOCK, np.float32)
    _, log_norm, entropy = scan(raw, block_max)
    if not math.isfinite(log_norm):
        return INVALID, np.empty(0, np.int64), np.empty(0), -1, 0.0, 0.0, entropy, 0.0
    ids, w = cut(raw, block_max, prefix, history, first_code, first_param, min_keep)
    ids, w = apply_stages(ids, w, tail, history, min_keep)
    if ids.size == 0:
        return EMPTY, ids, np.empty(0), -1, 0.0, 0.0, entropy, 0.0
    probs = softmax(w)
    at = draw(probs, u)
    token = ids[at]
    # Everything kept is the whole mass by definition; summing would only add rounding.
    kept_mass = 1.0 if ids.size == raw.size else mass(raw, ids, log_norm)
    return DECIDED, ids, probs, token, probs[at], kept_mass, entropy, raw[token] - log_norm


_GOLDEN_GAMMA = np.uint64(0x9E3779B97F4A7C15)
_MIX_1 = np.uint64(0xBF58476D1CE4E5B9)
_MIX_2 = np.uint64(0x94D049BB133111EB)


@njit(**_JIT)
def uniform(seed: Any, stream: Any) -> float:
    """Output ``stream`` (0-based) of SplitMix64 seeded with ``seed`` (Steele, Lea & Flood 2014)
    as a double in [0, 1) from its top 53 bits: ``core._uniforms`` in uint64 arithmetic, which
    wraps as the generator's does."""
    z = seed + (stream + np.uint64(1)) * _GOLDEN_GAMMA
    z = (z ^ (z >> np.uint64(30))) * _MIX_1
    z = (z ^ (z >> np.uint64(27))) * _MIX_2
    z = z ^ (z >> np.uint64(31))
    return float(z >> np.uint64(11)) * 2.0**-53


@njit(**_JIT)
def pick_row(ints: Any, floats: Any, seed: Any, row: Any, history: Any, stream: int) -> Any:
    """One row (1-D, read-only) with one plan row and its history (all of it: the penalties
    take their windows), drawing with output ``stream`` of SplitMix64 seeded with ``seed[0]``
    (a uint64 array, as a seed may not fit an int64): (status, token, kept size, kept mass,
    entropy, prob, logprob), the numbers ``pick_rows`` writes, as one tuple (a prompt step then
    reads no output arrays). The plan and seed come first, so that a ``functools.partial`` can
    hold them for a run (``compiled.one_row``)."""
    u = uniform(seed[0], np.uint64(stream))
    return _numbers(decide_row(row, ints, floats, history, u))


@njit(**_JIT)
def _numbers(decided: Any) -> Any:
    """A ``decide_row`` result as the numbers a pick hands back: (status, token, kept size,
    kept mass, entropy, prob, logprob)."""
    status, kept, _, token, prob, kept_mass, entropy, logprob = decided
    return status, token, kept.size, kept_mass, entropy, prob, logprob


@njit(**_JIT)
def pick_rows(
    rows: Any,
    lo: int,
    hi: int,
    ints: Any,
    floats: Any,
    histories: Any,
    lengths: Any,
    seed_stream: Any,
    out_ints: Any,
    out_floats: Any,
) -> int:
    """Rows ``lo:hi`` of a batch, each with its own row of ``ints``/``floats`` (or all with the
    only one) and its history ``histories[b, :lengths[b]]`` (or all with the only one), written
    into columns of ``out_ints`` (status, token, kept) and ``out_floats`` (kept mass, entropy,
    prob, logprob). Row ``b`` draws with output ``first_stream + b`` of SplitMix64 seeded with
    ``seed``; ``seed_stream`` is the uint64 pair (seed, first_stream). Returns how many rows it
    did not decide."""
    undecided = 0
    seed, first_stream = seed_stream[0], seed_stream[1]
    for b in range(lo, hi):
        plan = min(b, ints.shape[0] - 1)
        past = min(b, histories.shape[0] - 1)
        u = uniform(seed, first_stream + np.uint64(b))
        history = histories[past, : lengths[past]]
        numbers = _numbers(decide_row(rows[b], ints[plan], floats[plan], history, u))
        out_ints[0, b], out_ints[1, b], out_ints[2, b] = numbers[0], numbers[1], numbers[2]
        out_floats[0, b], out_floats[1, b] = numbers[3], numbers[4]
        out_floats[2, b], out_floats[3, b] = numbers[5], numbers[6]
        undecided += numbers[0] != DECIDED
    return undecided
