"""Compiled (numba) kernel of the emission scorer's new-type path (`features._TypeScorer`).

A new token type's score block is the sum of a few cached blocks (its shape with its kind, its lower
form, each prefix and suffix, ...). numpy would add them with one gather of (M, K*L) per part; this
adds them in one pass per type, skipping the parts a type does not have. The numpy code in
`features._TypeScorer` adds in the same order, so both give the same result bit for bit (a test checks).
"""

from __future__ import annotations

import threading
import warnings

import numba
import numpy as np

# The decode kernels' decorators: same options, machine code cached beside this module.
from streamtag.crf_kernels import _jit, _jit_cached


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
    probe_mask = hash_keys.shape[0] - 1
    width = np.uint64(bits)
    for m in range(starts.shape[0]):
        start, length = starts[m], lengths[m]
        for a in range(table_lengths.shape[0]):
            n = table_lengths[a]
            out[m, a] = 0
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
                    out[m, a] = hash_rows[slot]
                    break
                if found == EMPTY_KEY:
                    break
                slot = (slot + 1) & probe_mask


_LOAD_LOCK = threading.Lock()


def _warm_up(sums, affixes) -> None:
    """Compile (or load from the cache) the signatures `features` uses, on tiny inputs."""
    sums(np.zeros((2, 4)), np.array([0, -1], dtype=np.int64), np.array([[1, 0]], dtype=np.int64), 2,
         np.empty((1, 4)))
    index = np.zeros(1, dtype=np.int64)
    for codes in (np.zeros(1, dtype=np.uint8), np.zeros(1, dtype=np.uint32)):
        affixes(codes, index, index + 1, index + 1, np.ones(1, dtype=np.bool_), 7, 60,
                np.full(2, EMPTY_KEY), np.zeros(2, dtype=np.int64), 1, np.empty((1, 1), dtype=np.int64))


def load():
    """(sum_block_rows, affix_rows), compiled (from the cache when it can be read, else compiled
    afresh, silently)."""
    global sum_block_rows, affix_rows
    with _LOAD_LOCK, warnings.catch_warnings():
        warnings.simplefilter("ignore", numba.NumbaWarning)
        try:
            _warm_up(sum_block_rows, affix_rows)
        except Exception:  # noqa: BLE001 - a cache fault; a real compile error recurs below and is raised
            sum_block_rows = _jit(sum_block_rows.py_func)
            affix_rows = _jit(affix_rows.py_func)
            _warm_up(sum_block_rows, affix_rows)
        return sum_block_rows, affix_rows
