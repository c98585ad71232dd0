"""Compiled (numba) kernel of the emission scorer's new-type path (`features._TypeScorer`).

A new token type's score block is the sum of a few cached blocks (its shape with its kind, its lower
form, each prefix and suffix, ...). numpy would add them with one gather of (M, K*L) per part; this
adds them in one pass per type, skipping the parts a type does not have. The numpy code in
`features._TypeScorer` adds in the same order, so both give the same result bit for bit (a test checks).
"""

from __future__ import annotations

import threading
import warnings
from collections.abc import Callable
from typing import NamedTuple

import numba
import numpy as np
from llvmlite import ir
from numba import types
from numba.core import cgutils
from numba.extending import intrinsic

# The decode kernels' decorators: same options, machine code cached beside this module.
from streamtag.crf_kernels import _jit, _jit_cached, same_run
from streamtag.scan_kernels import _KEY_AHEAD, _SLOT_AHEAD, _prefetch


@_jit_cached
def sum_block_rows(blocks, slot_masks, rows, n_labels, out):
    """out[m] = the sum of blocks[rows[m, j]] over the parts j with rows[m, j] != 0, from 0.0 in order j.

    blocks (R, K*L) float64, K slots of n_labels each; slot_masks (R,) int64, bit k set when slot k of
    the block may be non-zero (-1: all slots); rows (M, P) int64, 0 meaning "no block" (blocks[0] is
    zero); out (M, K*L) float64, overwritten. Slots left out hold zeros, so skipping them changes no
    sum: it only saves reading them (an affix block, say, fills 2 of 5 slots).
    """
    width = blocks.shape[1]
    n_slots = width // n_labels
    for m in range(rows.shape[0]):
        for w in range(width):
            out[m, w] = 0.0
        for j in range(rows.shape[1]):
            row = rows[m, j]
            if row == 0:
                continue
            mask = slot_masks[row]
            for k in range(n_slots):
                if mask == -1 or (mask >> k) & 1:
                    base = k * n_labels
                    for label in range(n_labels):
                        out[m, base + label] += blocks[row, base + label]


# Multiplicative hashing (Knuth): the top bits of key * (2**64 / golden ratio), mod 2**64. No key is all
# ones (the table tag never fills its bits), so that marks an empty slot.
_GOLDEN = np.uint64(0x9E3779B97F4A7C15)
EMPTY_KEY = np.uint64(0xFFFFFFFFFFFFFFFF)


def hash_slot(key: int, hash_bits: int) -> int:
    """The first slot `affix_rows` probes for ``key`` in a table of 2**hash_bits slots."""
    return ((key * int(_GOLDEN)) & 0xFFFFFFFFFFFFFFFF) >> (64 - hash_bits)


@_jit
def _affix_rows_of(codes, start, length, table_lengths, table_is_prefix, bits, tag_shift, hash_keys, hash_rows,
                   hash_shift, out, m, column):
    """`affix_rows` of one type: out[m, column + a] for each table a."""
    probe_mask = hash_keys.shape[0] - 1
    width = np.uint64(bits)
    for a in range(table_lengths.shape[0]):
        n = table_lengths[a]
        out[m, column + a] = 0
        if n > length or n * bits > tag_shift:
            continue
        key = np.uint64(a) << np.uint64(tag_shift)
        for i in range(n):
            position = start + i if table_is_prefix[a] else start + length - 1 - i
            key |= np.uint64(codes[position]) << (width * np.uint64(i))
        slot = np.int64((key * _GOLDEN) >> hash_shift)
        while True:
            found = hash_keys[slot]
            if found == key:
                out[m, column + a] = hash_rows[slot]
                break
            if found == EMPTY_KEY:
                break
            slot = (slot + 1) & probe_mask


@_jit_cached
def affix_rows(codes, starts, lengths, table_lengths, table_is_prefix, bits, tag_shift, hash_keys, hash_rows,
               hash_bits, out):
    """out[m, a]: the row stored for type m's affix of table a, or 0 (unknown, or the type too short).

    codes (C,) code points of the batch's lower forms; starts, lengths (M,) each form's place in codes;
    table_lengths, table_is_prefix (A,); a key packs an affix's code points ``bits`` bits each, the
    first read lowest (a suffix is read from its last character back), with the table number from
    bit ``tag_shift`` (as `features._AffixTables` packs them). hash_keys, hash_rows (H,), H a power of
    two: an open-addressing table of the known keys, linear probing. Tables whose affix does not fit
    below the tag are left 0 (the caller fills them).
    """
    hash_shift = np.uint64(64 - hash_bits)
    for m in range(starts.shape[0]):
        _affix_rows_of(codes, starts[m], lengths[m], table_lengths, table_is_prefix, bits, tag_shift, hash_keys,
                       hash_rows, hash_shift, out, m, 0)


# FNV-1a (64-bit): a byte-at-a-time hash of a type's key; the table's slot comes from its top bits
# after the multiplicative step above, so the weak low bits of FNV do not matter.
_FNV_OFFSET = np.uint64(0xCBF29CE484222325)
_FNV_PRIME = np.uint64(0x100000001B3)
# Mixed in between a key's text and its kind, so that ("ab", "c") and ("a", "bc") hash apart.
_KIND_MARK = np.uint64(0xFF)
# Fields of a slot of the type index (one row of `slots`, so that a probe reads one cache line).
SLOT_HASH, SLOT_ROW, SLOT_START, SLOT_LENGTHS = 0, 1, 2, 3


@_jit_cached
def split_at_nul(data, starts, ends):
    """Cut ``data`` (D,) uint8, texts joined by one NUL byte each, into starts, ends (n,): the number
    of pieces found (n + 1 or more when a text itself holds a NUL: then starts and ends are unusable).
    An empty ``data`` is one empty piece."""
    n = starts.shape[0]
    piece = 0
    start = 0
    for i in range(data.shape[0]):
        if data[i] == 0:
            if piece < n:
                starts[piece] = start
                ends[piece] = i
            piece += 1
            start = i + 1
    if piece < n:
        starts[piece] = start
        ends[piece] = data.shape[0]
    return piece + 1


@_jit
def _key_hash(texts, text_start, text_end, kinds, kind_start, kind_end):
    """FNV-1a of a type's key: its text's bytes, a mark, its kind's bytes."""
    h = _FNV_OFFSET
    for i in range(text_start, text_end):
        h = (h ^ np.uint64(texts[i])) * _FNV_PRIME
    h = (h ^ _KIND_MARK) * _FNV_PRIME
    for i in range(kind_start, kind_end):
        h = (h ^ np.uint64(kinds[i])) * _FNV_PRIME
    return h


@_jit
def _find(slots, hash_bits, arena, h, texts, a, b, kinds, c, d):
    """(row, slot) of the key (texts[a:b], kinds[c:d]) of hash h in a type index (see `place_types`):
    row 0 when it is not there, with the empty slot where it would go."""
    probe_mask = slots.shape[0] - 1
    lengths = ((b - a) << 32) | (d - c)
    slot = np.int64((h * _GOLDEN) >> np.uint64(64 - hash_bits))
    signed_hash = np.int64(h)
    while True:
        found = slots[slot, SLOT_ROW]
        if found == 0:
            return 0, slot
        if slots[slot, SLOT_HASH] == signed_hash and slots[slot, SLOT_LENGTHS] == lengths:
            at = slots[slot, SLOT_START]
            if same_run(arena, at, texts, a, b - a) and same_run(arena, at + b - a, kinds, c, d - c):
                return found, slot
        slot = (slot + 1) & probe_mask


@_jit_cached
def place_types(texts, text_starts, text_ends, kinds, kind_starts, kind_ends, slots, hash_bits, arena, state,
                limit, longest_kept, rows, firsts):
    """Find each token's type (text, kind) in the type index, giving new types the next rows.

    texts, kinds (D,) uint8: the tokens' texts and kinds in UTF-8, token t's at [starts[t], ends[t]);
    slots (H, 4) int64, H = 2**hash_bits >= 2 * limit: open addressing, linear probing, a slot being
    (hash, row, key start in arena, text length << 32 | kind length), row 0 meaning empty;
    arena (A,) uint8 the kept keys' bytes (text then kind); state (2,) int64: rows in use (the next
    row to give; row 0 is the boundary row) and arena bytes in use, updated; limit: rows may not reach
    it; a text longer than ``longest_kept`` bytes is given a row but not kept (each of its tokens is a
    new type). Writes rows (N,) each token's row and firsts[:M] the token that brought each new row,
    in row order; returns M, or -1 when the rows or the arena ran out (the index is then spoiled: the
    caller empties it and asks again).
    """
    n_rows, used = state[0], state[1]
    n_new = 0
    n_tokens = text_starts.shape[0]
    # All keys hashed first, so that the slots of the keys _SLOT_AHEAD further on, and (half as far)
    # their stored keys, can be asked of memory while this one is looked up: the index outgrows the
    # caches, and each lookup was otherwise two waits for memory in a row.
    hashes = np.empty(n_tokens, dtype=np.uint64)
    for t in range(n_tokens):
        hashes[t] = _key_hash(texts, text_starts[t], text_ends[t], kinds, kind_starts[t], kind_ends[t])
    slot_shift = np.uint64(64 - hash_bits)
    for t in range(n_tokens):
        if t + _SLOT_AHEAD < n_tokens:
            _prefetch(slots, np.int64((hashes[t + _SLOT_AHEAD] * _GOLDEN) >> slot_shift))
        if t + _KEY_AHEAD < n_tokens:
            ahead = np.int64((hashes[t + _KEY_AHEAD] * _GOLDEN) >> slot_shift)
            if slots[ahead, SLOT_ROW] != 0:
                _prefetch(arena, slots[ahead, SLOT_START])
        a, b, c, d = text_starts[t], text_ends[t], kind_starts[t], kind_ends[t]
        h = hashes[t]
        row, slot = _find(slots, hash_bits, arena, h, texts, a, b, kinds, c, d)
        if row == 0:
            if n_rows >= limit:
                return -1
            row = n_rows
            n_rows += 1
            firsts[n_new] = t
            n_new += 1
            if b - a <= longest_kept:
                if used + (b - a) + (d - c) > arena.shape[0]:
                    return -1
                arena[used : used + b - a] = texts[a:b]
                arena[used + b - a : used + b - a + d - c] = kinds[c:d]
                slots[slot, SLOT_HASH] = np.int64(h)
                slots[slot, SLOT_ROW] = row
                slots[slot, SLOT_START] = used
                slots[slot, SLOT_LENGTHS] = ((b - a) << 32) | (d - c)
                used += (b - a) + (d - c)
        rows[t] = row
    state[0], state[1] = n_rows, used
    return n_new


# Tags of the value lookups `ascii_part_rows` makes in one index (a key's "kind"): the lower form and
# its word lists, the cut lower form, the shape, the collapsed shape.
LOOKUP_WORD, LOOKUP_CUT, LOOKUP_SHAPE, LOOKUP_COLLAPSED = 0, 1, 2, 3
# Columns of a part row (`features._TypeScorer._part_rows`): shape value, collapsed shape value, shape
# rest with kind (filled by the caller from the signature), word, then the cut lower form if used, then
# the affix tables.
COLUMN_VALUE, COLUMN_COLLAPSED, COLUMN_CLASS, COLUMN_WORD, COLUMN_CUT = 0, 1, 2, 3, 4


@_jit
def _lookup(slots, hash_bits, arena, values, texts, a, b, tags, tag):
    """values[row] of the key (texts[a:b], tag) in a lookup index, or 0 if absent."""
    h = _key_hash(texts, a, b, tags, tag, tag + 1)
    row, _ = _find(slots, hash_bits, arena, h, texts, a, b, tags, tag, tag + 1)
    return values[row]


@_jit_cached
def ascii_part_rows(texts, starts, ends, shape_of_byte, char_bits, flag_bits, upper_bit, lower_bit, length_bounds,
                    cut, use_cut, slots, hash_bits, arena, values, tags, table_lengths, table_is_prefix, tag_shift,
                    affix_keys, affix_values, affix_hash_bits, out, signatures):
    """The part rows of types of ASCII text (`features._TypeScorer._part_rows`), from their bytes.

    texts (D,) uint8; starts, ends (M,) each type's text; shape_of_byte (256,) uint8 the ASCII word
    shape of each byte; char_bits (129,) int64 and flag_bits, upper_bit, lower_bit: the signature's
    bits (`features._shape_signatures`); length_bounds (B,) ascending; cut: the value cut (chars);
    use_cut: whether a long lower form has its cut value's block; slots, hash_bits, arena, values,
    tags: a lookup index (keys: a value's UTF-8 bytes tagged LOOKUP_*, values (V,) store rows); then
    the affix tables (see `affix_rows`, 7 bits per code point). Writes out (M, P) (the class column
    left 0) and signatures (M,) each shape's signature code; returns the number of types that are
    not plain ASCII (a byte >= 128 or a NUL; their rows are unusable and their signatures -1: the
    caller scores them its own way).
    """
    longest = 0
    for m in range(starts.shape[0]):
        longest = max(longest, ends[m] - starts[m])
    shape = np.empty(max(longest, 1), dtype=np.uint8)
    collapsed = np.empty(max(longest, 1), dtype=np.uint8)
    lower = np.empty(max(longest, 1), dtype=np.uint8)
    affix_shift = np.uint64(64 - affix_hash_bits)
    first_affix = out.shape[1] - table_lengths.shape[0]
    others = 0
    for m in range(starts.shape[0]):
        a, n = starts[m], ends[m] - starts[m]
        plain = True
        for i in range(n):
            byte = texts[a + i]
            if byte == 0 or byte >= 128:
                plain = False
                break
            shape[i] = shape_of_byte[byte]
            lower[i] = byte + 32 if 65 <= byte <= 90 else byte
        if not plain:
            others += 1
            signatures[m] = -1
            continue
        # The signature: flag characters present, first "X", title case (no cased character before
        # an "X", one before each "x", at least one cased), ASCII, length bucket.
        present = 0
        broken = False
        cased_before = False
        n_collapsed = 0
        for i in range(n):
            code = shape[i]
            present |= char_bits[code]
            is_upper, is_lower = code == 88, code == 120      # "X", "x"
            if (is_upper and cased_before) or (is_lower and not cased_before):
                broken = True
            cased_before = is_upper or is_lower
            if i == 0 or code != shape[i - 1]:
                collapsed[n_collapsed] = code
                n_collapsed += 1
        signature = 0
        if n:
            title = (present & (upper_bit | lower_bit)) != 0 and not broken
            signature = present | (np.int64(shape[0] == 88) << flag_bits) | (np.int64(title) << (flag_bits + 1))
        bucket = 0
        while bucket < length_bounds.shape[0] and length_bounds[bucket] < n:
            bucket += 1
        signatures[m] = signature | (np.int64(1) << (flag_bits + 2)) | (np.int64(bucket) << (flag_bits + 3))
        out[m, COLUMN_VALUE] = _lookup(slots, hash_bits, arena, values, shape, 0, min(n, cut), tags, LOOKUP_SHAPE)
        out[m, COLUMN_COLLAPSED] = _lookup(slots, hash_bits, arena, values, collapsed, 0, min(n_collapsed, cut),
                                           tags, LOOKUP_COLLAPSED)
        out[m, COLUMN_CLASS] = 0
        word = _lookup(slots, hash_bits, arena, values, lower, 0, n, tags, LOOKUP_WORD)
        out[m, COLUMN_WORD] = word
        if use_cut:
            out[m, COLUMN_CUT] = _lookup(slots, hash_bits, arena, values, lower, 0, cut, tags, LOOKUP_CUT) \
                if n > cut and word == 0 else 0
        if table_lengths.shape[0]:
            _affix_rows_of(lower, 0, n, table_lengths, table_is_prefix, 7, tag_shift, affix_keys, affix_values,
                           affix_shift, out, m, first_affix)
    return others


# Tokens ahead whose type row `sum_emissions` asks the memory for: the table (rows x K x L doubles, tens
# of MB) is read at random rows, and without the hint each token waited for its rows (measured: 16
# ahead took the kernel from ~3.3 to ~1.4 ms per 1000 lines; 4 and 8 ahead, ~2.3).
_PREFETCH_AHEAD = 16
_CACHE_LINE = 64
_PREFETCH_LINES = 12


@intrinsic
def _prefetch_row(typingctx, table, row):
    """Hint that all of table[row] will be read soon (LLVM's prefetch, for reading, kept in every
    cache level): the next cache lines of the row are asked for at once. No effect on any result."""
    signature = types.void(table, row)

    def codegen(context, builder, sig, args):
        array_type = sig.args[0]
        array = context.make_array(array_type)(context, builder, args[0])
        zero = context.get_constant(types.intp, 0)
        pointer = cgutils.get_item_pointer(context, builder, array_type, array,
                                           [args[1]] + [zero] * (array_type.ndim - 1))
        byte_pointer = ir.IntType(8).as_pointer()
        int32 = ir.IntType(32)
        prefetch = cgutils.get_or_insert_function(
            builder.module, ir.FunctionType(ir.VoidType(), [byte_pointer, int32, int32, int32]), "llvm.prefetch.p0")
        start = builder.bitcast(pointer, byte_pointer)
        # 12 lines: a row of K=5 slots x L=19 doubles (760 bytes). Other sizes are as correct, hinted
        # less well (a prefetch past the array never faults).
        for line in range(_PREFETCH_LINES):
            address = builder.gep(start, [ir.Constant(ir.IntType(64), _CACHE_LINE * line)])
            builder.call(prefetch, [address, int32(0), int32(3), int32(1)])
        return context.get_dummy_value()

    return signature, codegen


@_jit_cached
def sum_emissions(table, rows, lengths, offsets, constants, rel_base, rel_buckets, first_last, out):
    """E (N, L) of a batch from per-type score blocks: `features.EmissionScorer.emissions`, compiled.

    table (R, K, L): per type row and window slot, the summed weights the type lends there (row 0:
    the boundary blocks); rows (N,) each token's type row; lengths (S,); offsets (K,) the slots'
    offsets (offsets[0] = 0); constants (C, L): bias, first, last, then the relative buckets from
    rel_base. Adds in the numpy code's order (own block + bias, first, last, bucket, then slots), so
    the result is the same bit for bit. One pass per token, no (N, L) temporaries; each token's row
    is asked for from memory _PREFETCH_AHEAD tokens before it is read (the table outgrows the caches).
    """
    n_labels = table.shape[2]
    n_tokens = rows.shape[0]
    base = 0
    for s in range(lengths.shape[0]):
        n = lengths[s]
        for i in range(n):
            t = base + i
            if t + _PREFETCH_AHEAD < n_tokens:
                _prefetch_row(table, rows[t + _PREFETCH_AHEAD])
            row = rows[t]
            for label in range(n_labels):
                out[t, label] = table[row, 0, label] + constants[0, label]
            if first_last and i == 0:
                for label in range(n_labels):
                    out[t, label] += constants[1, label]
            if first_last and i == n - 1:
                for label in range(n_labels):
                    out[t, label] += constants[2, label]
            if rel_buckets > 0:
                bucket = rel_base + i * rel_buckets // n
                for label in range(n_labels):
                    out[t, label] += constants[bucket, label]
            for k in range(1, offsets.shape[0]):
                j = i + offsets[k]
                neighbour = rows[base + j] if 0 <= j < n else 0
                for label in range(n_labels):
                    out[t, label] += table[neighbour, k, label]
        base += n


_LOAD_LOCK = threading.Lock()


class Kernels(NamedTuple):
    """The compiled kernels `features` uses."""

    sum_block_rows: Callable
    affix_rows: Callable
    split_at_nul: Callable
    place_types: Callable
    ascii_part_rows: Callable
    sum_emissions: Callable


_TAGS = np.frombuffer(b"a", dtype=np.uint8)    # read-only, as features' value lookup tags


def _warm_up(kernels: Kernels) -> None:
    """Compile (or load from the cache) the signatures `features` uses, on tiny inputs."""
    kernels.sum_block_rows(np.zeros((2, 4)), np.array([0, -1], dtype=np.int64), np.array([[1, 0]], dtype=np.int64),
                           2, np.empty((1, 4)))
    index = np.zeros(1, dtype=np.int64)
    for codes in (np.zeros(1, dtype=np.uint8), np.zeros(1, dtype=np.uint32)):
        kernels.affix_rows(codes, index, index + 1, index + 1, np.ones(1, dtype=np.bool_), 7, 60,
                           np.full(2, EMPTY_KEY), np.zeros(2, dtype=np.int64), 1, np.empty((1, 1), dtype=np.int64))
    data = np.frombuffer(b"a", dtype=np.uint8)
    kernels.split_at_nul(data, np.empty(1, dtype=np.int64), np.empty(1, dtype=np.int64))
    kernels.place_types(data, index, index + 1, data, index, index + 1, np.zeros((4, 4), dtype=np.int64), 2,
                        np.zeros(4, dtype=np.uint8), np.ones(2, dtype=np.int64), 2, 1, np.empty(1, dtype=np.int64),
                        np.empty(1, dtype=np.int64))
    # The type index's keys: a text's code points (writable uint32, as the tokenizer's) and a kind id.
    points = np.ones(1, dtype=np.uint32)
    kernels.place_types(points, index, index + 1, points, index, index + 1, np.zeros((4, 4), dtype=np.int64), 2,
                        np.zeros(4, dtype=np.uint32), np.ones(2, dtype=np.int64), 2, 1, np.empty(1, dtype=np.int64),
                        np.empty(1, dtype=np.int64))
    table_lengths = np.ones(1, dtype=np.int64)
    for data in (data, points):     # a new type's text: UTF-8 bytes, or code points (the tokenizer's)
        kernels.ascii_part_rows(data, index, index + 1, np.zeros(256, dtype=np.uint8), np.zeros(129, dtype=np.int64), 11,
                                2, 4, np.ones(1, dtype=np.int64), 4, True, np.zeros((4, 4), dtype=np.int64), 2,
                                np.zeros(4, dtype=np.uint8), np.zeros(2, dtype=np.int64), _TAGS, table_lengths,
                                np.ones(1, dtype=np.bool_), 60, np.full(2, EMPTY_KEY), np.zeros(2, dtype=np.int64), 1,
                                np.empty((1, 6), dtype=np.int64), np.empty(1, dtype=np.int64))
    kernels.sum_emissions(np.zeros((2, 2, 1)), np.array([1, 1], dtype=np.int64), np.array([2], dtype=np.int64),
                          np.array([0, 1], dtype=np.int64), np.zeros((4, 1)), 3, 1, True, np.empty((2, 1)))


_KERNELS = ("sum_block_rows", "affix_rows", "split_at_nul", "place_types", "ascii_part_rows", "sum_emissions")


def load() -> Kernels:
    """The kernels, compiled (from the cache when it can be read, else compiled afresh, silently)."""
    with _LOAD_LOCK, warnings.catch_warnings():
        warnings.simplefilter("ignore", numba.NumbaWarning)
        kernels = Kernels(*(globals()[name] for name in _KERNELS))
        try:
            _warm_up(kernels)
        except Exception:  # noqa: BLE001 - a cache fault; a real compile error recurs below and is raised
            kernels = Kernels(*(_jit(kernel.py_func) for kernel in kernels))
            _warm_up(kernels)
            globals().update(zip(_KERNELS, kernels))
        return kernels
