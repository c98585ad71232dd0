"""Compiled (numba) Viterbi and forward-backward for the decode hot path; same results as crf.py's numpy code.

The kernels take the batch in crf's packed layout (time-major, label-major (L, N): the columns of time
step t are the sequences still running, longest first) and run the per-step loops of `crf` in compiled
code: for each next label, for each allowed previous label, one pass over a tile of the step's
columns. The innermost loop thus runs over sequences of the batch, which the compiler turns into SIMD
code, where numpy would pay a call and a temporary per small block. (A first version walked one
sequence at a time with the label loop innermost; with 19 labels that loop does not vectorise and was
measured 3-4x slower than this layout.)

Semantics are those of `crf.viterbi`, `crf.forward_backward` and `crf.decode` (see `crf.ForwardBackward`).
Viterbi sums in the numpy code's order and breaks ties the same way (the first, lowest label index
wins, both at the last token and in the backtrace, which finds each best predecessor again from the
stored scores), so paths and scores are identical bit for bit.

Forward-backward runs in scaled probability space: factors exp(E - max of the token's row),
exp(trans - max trans), each column renormalised to sum 1 per step with the log of the scale kept
per column. This needs no exp/log per (label, label) pair. A value that should be positive but falls
below _TINY (it may be sub-normal or have underflowed: extreme weights), a zero or non-finite
normaliser, or a token whose emissions have no finite maximum marks the sequence as *suspect*; the
caller recomputes suspect sequences with `exact_forward_backward` (log-sum-exp at every entry). A zero
is accepted only if -inf scores force it (a forbidden move or emission), so exact zeros stay exact.

Arrays passed in must be C-contiguous, writable, float64 (indices int64): `crf` prepares them, so each
kernel is compiled for one signature only.
"""

from __future__ import annotations

import threading
import warnings

import numba
import numpy as np

# Same threshold as crf._TINY: a scaled value below it may be sub-normal (lost precision) or a
# product that underflowed to 0, so the sequence is redone in log space.
_TINY = 1e-290
_NEG_INF = -np.inf
# Columns per tile: (L, _TILE) blocks of the previous step stay in the first-level cache.
_TILE = 128
# error_model "numpy": a division by zero gives inf (checked afterwards) instead of a test per division.
_OPTIONS = {"nogil": True, "error_model": "numpy"}


def _jit(function):
    """A helper, compiled into the kernels that call it (their cache holds its machine code)."""
    return numba.njit(cache=False, **_OPTIONS)(function)


def _jit_cached(function):
    """A kernel, its machine code cached in __pycache__ beside this module (or numba's user cache).

    numba raises RuntimeError at decoration when no cache folder is writable (a read-only install
    with a read-only home); the kernel is then simply compiled in each process.
    """
    try:
        return numba.njit(cache=True, **_OPTIONS)(function)
    except RuntimeError:
        return numba.njit(cache=False, **_OPTIONS)(function)


@_jit
def _exp_shifted(values):
    """(exp(values - shift), shift) with shift = the largest finite entry (0 if none), any shape."""
    shift = _NEG_INF
    for v in values.ravel():
        if np.isfinite(v) and v > shift:
            shift = v
    if shift == _NEG_INF:
        shift = 0.0
    return np.exp(values - shift), shift


@_jit_cached
def pack_emissions(E, flat_of_packed):
    """E (N, L) flat -> Ep (L, N) packed (column c holds token flat_of_packed[c]) and its column maxima (N,).

    One gather-and-transpose pass; numpy's fancy indexing plus a blocked transpose measured several
    times slower for 19 labels.
    """
    n_tokens, n_labels = E.shape
    Ep = np.empty((n_labels, n_tokens))
    peak = np.empty(n_tokens)
    for col in range(n_tokens):
        row = flat_of_packed[col]
        top = _NEG_INF
        for j in range(n_labels):
            value = E[row, j]
            Ep[j, col] = value
            top = value if value > top else top
        peak[col] = top  # a NaN emission is not seen here; it makes the scaled sums NaN, which are caught
    return Ep, peak


# ----------------------------------------------------------------------------------------------------
# Viterbi


@_jit
def _viterbi_forward(Ep, batch_sizes, step_start, trans, start, delta):
    """delta (L, N) packed: delta[t, j] = max_i (delta[t-1, i] + trans[i, j]) + E[t, j], as crf does."""
    n_labels = Ep.shape[0]
    if batch_sizes.size == 0:
        return
    for j in range(n_labels):
        for col in range(batch_sizes[0]):
            delta[j, col] = start[j] + Ep[j, col]
    for t in range(1, batch_sizes.size):
        cur, prev, count = step_start[t], step_start[t - 1], batch_sizes[t]
        for tile in range(0, count, _TILE):
            stop = min(tile + _TILE, count)
            for j in range(n_labels):
                out = delta[j, cur + tile:cur + stop]
                out[:] = _NEG_INF
                for i in range(n_labels):
                    step = trans[i, j]
                    if step == _NEG_INF:  # adds only -inf candidates: skipping it changes nothing
                        continue
                    source = delta[i, prev + tile:prev + stop]
                    for r in range(stop - tile):
                        candidate = source[r] + step
                        out[r] = candidate if candidate > out[r] else out[r]
                emission = Ep[j, cur + tile:cur + stop]
                for r in range(stop - tile):
                    out[r] += emission[r]


@_jit
def _viterbi_backtrace(delta, batch_sizes, step_start, last_packed, trans, end, labels, final_scores):
    """Labels (N,) packed and the path score of each non-empty sequence (in last_packed's order).

    The last label is the first argmax of delta + end; walking back, each label is the first argmax
    of delta[t] + trans[:, next label], as in crf (no back-pointers are stored).
    """
    n_labels = delta.shape[0]
    for k in range(last_packed.size):
        col = last_packed[k]
        label = 0
        top = delta[0, col] + end[0]
        for j in range(1, n_labels):
            value = delta[j, col] + end[j]
            if value > top:  # strict: ties keep the lowest label, like numpy's argmax
                top = value
                label = j
        labels[col] = label
        final_scores[k] = top
    for t in range(batch_sizes.size - 2, -1, -1):
        nxt, cur = step_start[t + 1], step_start[t]
        for r in range(batch_sizes[t + 1]):
            following = labels[nxt + r]
            label = 0
            top = delta[0, cur + r] + trans[0, following]
            for i in range(1, n_labels):
                value = delta[i, cur + r] + trans[i, following]
                if value > top:
                    top = value
                    label = i
            labels[cur + r] = label


@_jit
def _viterbi(Ep, batch_sizes, step_start, last_packed, flat_of_packed, trans, start, end, delta):
    """Labels (N,) in flat order and path scores (S,); delta (L, N) is scratch."""
    n_tokens = Ep.shape[1]
    labels = np.zeros(n_tokens, dtype=np.int64)
    final_scores = np.empty(last_packed.size)
    _viterbi_forward(Ep, batch_sizes, step_start, trans, start, delta)
    _viterbi_backtrace(delta, batch_sizes, step_start, last_packed, trans, end, labels, final_scores)
    flat_labels = np.empty(n_tokens, dtype=np.int64)
    for col in range(n_tokens):
        flat_labels[flat_of_packed[col]] = labels[col]
    return flat_labels, final_scores


@_jit_cached
def viterbi_packed(Ep, batch_sizes, step_start, last_packed, flat_of_packed, trans, start, end):
    """Best paths: Ep (L, N) packed -> labels (N,) int64 in flat order, scores (S,) of the non-empty
    sequences (in last_packed's order)."""
    return _viterbi(Ep, batch_sizes, step_start, last_packed, flat_of_packed, trans, start, end,
                    np.empty(Ep.shape))


# ----------------------------------------------------------------------------------------------------
# Forward-backward, scaled


@_jit
def _alpha_zero_is_exact(Ep, col, prev_col, j, trans, start, alpha):
    """Whether alpha at (label j, column col) is truly 0: forced by -inf scores, not by underflow."""
    if Ep[j, col] == _NEG_INF:
        return True
    if prev_col < 0:
        return start[j] == _NEG_INF
    for i in range(trans.shape[0]):
        if alpha[i, prev_col] != 0.0 and trans[i, j] != _NEG_INF:
            return False
    return True


@_jit
def _beta_zero_is_exact(Ep, col_after, i, trans, beta):
    """Whether beta at (label i, the column before col_after) is truly 0, forced by -inf scores."""
    for j in range(trans.shape[1]):
        if beta[j, col_after] != 0.0 and trans[i, j] != _NEG_INF and Ep[j, col_after] != _NEG_INF:
            return False
    return True


@_jit
def _scaled_forward(Ep, emission_exp, peak, batch_sizes, step_start, seq_of_col, trans, trans_exp, trans_shift,
                    start, start_exp, start_shift, alpha, alpha_shift, suspect, sums, totals, lows):
    """alpha (L, N) packed, scaled to sum 1 per column, with log scale alpha_shift (N,). Flags suspect
    sequences."""
    n_labels = Ep.shape[0]
    if batch_sizes.size == 0:
        return
    for col in range(batch_sizes[0]):
        total = 0.0
        low = np.inf
        for j in range(n_labels):
            value = start_exp[j] * emission_exp[j, col]
            alpha[j, col] = value
            total += value
            low = value if value < low else low
        if not (0.0 < total < np.inf) or not np.isfinite(peak[col]):
            suspect[seq_of_col[col]] = True
            total = 1.0
        elif low < _TINY:
            for j in range(n_labels):
                value = alpha[j, col]
                if value < _TINY and not (value == 0.0 and _alpha_zero_is_exact(Ep, col, -1, j, trans, start, alpha)):
                    suspect[seq_of_col[col]] = True
        alpha_shift[col] = start_shift + peak[col] + np.log(total)
        scale = 1.0 / total
        for j in range(n_labels):
            alpha[j, col] *= scale
    for t in range(1, batch_sizes.size):
        cur, prev, count = step_start[t], step_start[t - 1], batch_sizes[t]
        for tile in range(0, count, _TILE):
            stop = min(tile + _TILE, count)
            width = stop - tile
            for j in range(n_labels):
                acc = sums[j, :width]
                acc[:] = 0.0
                for i in range(n_labels):
                    factor = trans_exp[i, j]
                    if factor == 0.0:  # a forbidden move (or one far below the others): adds exact zeros
                        continue
                    source = alpha[i, prev + tile:prev + stop]
                    for r in range(width):
                        acc[r] += source[r] * factor
            totals[:width] = 0.0
            lows[:width] = np.inf
            for j in range(n_labels):
                acc = sums[j, :width]
                emission = emission_exp[j, cur + tile:cur + stop]
                for r in range(width):
                    value = acc[r] * emission[r]
                    acc[r] = value
                    totals[r] += value
                    lows[r] = value if value < lows[r] else lows[r]
            for r in range(width):
                col, prev_col = cur + tile + r, prev + tile + r
                total = totals[r]
                if not (0.0 < total < np.inf) or not np.isfinite(peak[col]):
                    suspect[seq_of_col[col]] = True
                    total = 1.0
                elif lows[r] < _TINY:
                    for j in range(n_labels):
                        value = sums[j, r]
                        if value < _TINY and not (
                                value == 0.0 and _alpha_zero_is_exact(Ep, col, prev_col, j, trans, start, alpha)):
                            suspect[seq_of_col[col]] = True
                alpha_shift[col] = alpha_shift[prev_col] + trans_shift + peak[col] + np.log(total)
                totals[r] = 1.0 / total
            for j in range(n_labels):
                acc = sums[j, :width]
                out = alpha[j, cur + tile:cur + stop]
                for r in range(width):
                    out[r] = acc[r] * totals[r]


@_jit
def _scaled_backward(Ep, emission_exp, peak, batch_sizes, step_start, last_packed, seq_of_col, trans,
                     trans_exp, trans_shift, end, end_exp, end_shift, beta, beta_shift, suspect, sums, weighted,
                     totals, lows):
    """beta (L, N) packed, scaled per column, with log scale beta_shift (N,). Flags suspect sequences."""
    n_labels = Ep.shape[0]
    end_is_safe = True
    for j in range(n_labels):
        if end_exp[j] < _TINY and end[j] != _NEG_INF:
            end_is_safe = False
    for k in range(last_packed.size):
        col = last_packed[k]
        for j in range(n_labels):
            beta[j, col] = end_exp[j]
        beta_shift[col] = end_shift
        if not end_is_safe:
            suspect[seq_of_col[col]] = True
    for t in range(batch_sizes.size - 1, 0, -1):
        cur, prev, count = step_start[t], step_start[t - 1], batch_sizes[t]
        for tile in range(0, count, _TILE):
            stop = min(tile + _TILE, count)
            width = stop - tile
            for j in range(n_labels):
                after = weighted[j, :width]
                emission = emission_exp[j, cur + tile:cur + stop]
                scaled = beta[j, cur + tile:cur + stop]
                for r in range(width):
                    after[r] = emission[r] * scaled[r]
            totals[:width] = 0.0
            lows[:width] = np.inf
            for i in range(n_labels):
                acc = sums[i, :width]
                acc[:] = 0.0
                for j in range(n_labels):
                    factor = trans_exp[i, j]
                    if factor == 0.0:
                        continue
                    after = weighted[j, :width]
                    for r in range(width):
                        acc[r] += after[r] * factor
                for r in range(width):
                    totals[r] += acc[r]
                    lows[r] = acc[r] if acc[r] < lows[r] else lows[r]
            for r in range(width):
                col, prev_col = cur + tile + r, prev + tile + r
                total = totals[r]
                if not (0.0 < total < np.inf):
                    suspect[seq_of_col[col]] = True
                    total = 1.0
                elif lows[r] < _TINY:
                    for i in range(n_labels):
                        value = sums[i, r]
                        if value < _TINY and not (value == 0.0 and _beta_zero_is_exact(Ep, col, i, trans, beta)):
                            suspect[seq_of_col[col]] = True
                beta_shift[prev_col] = beta_shift[col] + trans_shift + peak[col] + np.log(total)
                totals[r] = 1.0 / total
            for i in range(n_labels):
                acc = sums[i, :width]
                out = beta[i, prev + tile:prev + stop]
                for r in range(width):
                    out[r] = acc[r] * totals[r]


@_jit
def _unpack(packed, shift, flat_of_packed, flat, flat_shift):
    """packed (L, N) and shift (N,) -> flat (N, L) and flat_shift (N,): column c goes to row flat_of_packed[c].

    Column by column, so each flat row is written whole (writing one label of many rows at a time
    inside the recursions measured five times slower).
    """
    n_labels, n_tokens = packed.shape
    for col in range(n_tokens):
        row = flat_of_packed[col]
        flat_shift[row] = shift[col]
        for j in range(n_labels):
            flat[row, j] = packed[j, col]


@_jit_cached
def decode_packed(Ep, emission_exp, peak, batch_sizes, step_start, last_packed, flat_of_packed, seq_of_col,
                  n_seqs, trans, start, end):
    """Viterbi and scaled forward-backward over a packed batch.

    Ep (L, N) packed emissions, emission_exp (L, N) = exp(Ep - peak), peak (N,) the per-token maximum;
    batch_sizes (T,), step_start (T + 1,), last_packed (S,) the last column of each non-empty sequence,
    flat_of_packed (N,) the flat token of each column, seq_of_col (N,) its sequence, n_seqs B;
    trans (L, L), start (L,), end (L,) masked.
    Returns, in flat order: labels (N,), then path scores (S,), alpha (N, L) and alpha_shift (N,) with
    log_alpha = log(alpha) + alpha_shift[:, None], likewise beta and beta_shift, log Z (S,), and
    suspect (B,) bool: sequences whose scaled values are not trustworthy (to redo exactly).
    """
    n_labels, n_tokens = Ep.shape
    work = np.empty((n_labels, n_tokens))  # Viterbi scores, then alpha, then beta (packed)
    labels, final_scores = _viterbi(Ep, batch_sizes, step_start, last_packed, flat_of_packed, trans, start,
                                    end, work)
    trans_exp, trans_shift = _exp_shifted(trans)
    start_exp, start_shift = _exp_shifted(start)
    end_exp, end_shift = _exp_shifted(end)
    alpha_flat = np.empty((n_tokens, n_labels))
    beta_flat = np.empty((n_tokens, n_labels))
    alpha_shift_flat = np.empty(n_tokens)
    beta_shift_flat = np.empty(n_tokens)
    shifts = np.empty(n_tokens)
    suspect = np.zeros(n_seqs, dtype=np.bool_)
    sums = np.empty((n_labels, _TILE))
    weighted = np.empty((n_labels, _TILE))
    totals = np.empty(_TILE)
    lows = np.empty(_TILE)
    _scaled_forward(Ep, emission_exp, peak, batch_sizes, step_start, seq_of_col, trans, trans_exp, trans_shift,
                    start, start_exp, start_shift, work, shifts, suspect, sums, totals, lows)
    log_z = np.empty(last_packed.size)
    for k in range(last_packed.size):
        col = last_packed[k]
        total = 0.0
        for j in range(n_labels):
            total += work[j, col] * end_exp[j]
        if not (_TINY <= total < np.inf):
            suspect[seq_of_col[col]] = True
            total = 1.0
        log_z[k] = shifts[col] + end_shift + np.log(total)
    _unpack(work, shifts, flat_of_packed, alpha_flat, alpha_shift_flat)
    _scaled_backward(Ep, emission_exp, peak, batch_sizes, step_start, last_packed, seq_of_col, trans, trans_exp,
                     trans_shift, end, end_exp, end_shift, work, shifts, suspect, sums, weighted, totals, lows)
    _unpack(work, shifts, flat_of_packed, beta_flat, beta_shift_flat)
    return labels, final_scores, alpha_flat, alpha_shift_flat, beta_flat, beta_shift_flat, log_z, suspect


# ----------------------------------------------------------------------------------------------------
# Forward-backward, exact (the fallback)


@_jit
def _log_sum_exp_pair(first, second):
    """log(sum(exp(first + second))) of two (L,) vectors; -inf if every sum is -inf."""
    peak = _NEG_INF
    for k in range(first.size):
        v = first[k] + second[k]
        if v > peak:
            peak = v
    if not np.isfinite(peak):  # as crf._peak: no finite maximum -> shift by 0 (all -inf gives -inf)
        peak = 0.0
    total = 0.0
    for k in range(first.size):
        total += np.exp(first[k] + second[k] - peak)
    return np.log(total) + peak


@_jit_cached
def exact_forward_backward(E, offsets, lengths, seqs, trans, start, end, log_alpha, log_beta, log_z):
    """Redo sequences seqs (K,) with log-sum-exp at every entry, flat layout, in place.

    E (N, L), offsets and lengths (B,), trans (L, L), start (L,), end (L,); writes their rows of
    log_alpha and log_beta (N, L) and their entries of log_z (B,).
    """
    n_labels = E.shape[1]
    trans_t = np.ascontiguousarray(trans.T)
    column = np.empty(n_labels)
    for b in seqs:
        first, n = offsets[b], lengths[b]
        if n == 0:
            continue
        for j in range(n_labels):
            log_alpha[first, j] = start[j] + E[first, j]
        for t in range(first + 1, first + n):
            for j in range(n_labels):
                log_alpha[t, j] = _log_sum_exp_pair(log_alpha[t - 1], trans_t[j]) + E[t, j]
        last = first + n - 1
        for j in range(n_labels):
            log_beta[last, j] = end[j]
        for t in range(last - 1, first - 1, -1):
            for j in range(n_labels):
                column[j] = E[t + 1, j] + log_beta[t + 1, j]
            for i in range(n_labels):
                log_beta[t, i] = _log_sum_exp_pair(trans[i], column)
        log_z[b] = _log_sum_exp_pair(log_alpha[last], end)


# ----------------------------------------------------------------------------------------------------
# Loading


_LOAD_LOCK = threading.Lock()


def _warm_up(pack, decode, viterbi, exact) -> None:
    """Compile (or load from the cache) the one signature crf uses, on a tiny batch."""
    E = np.zeros((3, 2))
    order = np.array([0, 2, 1], dtype=np.int64)
    Ep, peak = pack(E, order)
    sizes = np.array([2, 1], dtype=np.int64)
    steps = np.array([0, 2, 3], dtype=np.int64)
    last = np.array([2, 1], dtype=np.int64)
    seq_of_col = np.array([0, 1, 0], dtype=np.int64)
    square, vector = np.zeros((2, 2)), np.zeros(2)
    decode(Ep, np.ones((2, 3)), peak, sizes, steps, last, order, seq_of_col, 3, square, vector, vector)
    viterbi(Ep, sizes, steps, last, order, square, vector, vector)
    lengths = np.array([2, 1, 0], dtype=np.int64)
    exact(E, np.array([0, 2, 3], dtype=np.int64), lengths, np.array([0, 1, 2], dtype=np.int64),
          square, vector, vector, np.empty((3, 2)), np.empty((3, 2)), np.zeros(3))


def load():
    """(pack_emissions, decode_packed, viterbi_packed, exact_forward_backward), compiled; call once
    before using them.

    A cache that cannot be read or written (corrupt files, a folder that became read-only, a full
    disk) must not stop tagging: the kernels are then compiled again without the cache, silently.
    """
    global pack_emissions, decode_packed, viterbi_packed, exact_forward_backward
    with _LOAD_LOCK, warnings.catch_warnings():
        warnings.simplefilter("ignore", numba.NumbaWarning)
        try:
            _warm_up(pack_emissions, decode_packed, viterbi_packed, exact_forward_backward)
        except Exception:  # noqa: BLE001 - any cache fault; a real compile error recurs below and is raised
            pack_emissions = _jit(pack_emissions.py_func)
            decode_packed = _jit(decode_packed.py_func)
            viterbi_packed = _jit(viterbi_packed.py_func)
            exact_forward_backward = _jit(exact_forward_backward.py_func)
            _warm_up(pack_emissions, decode_packed, viterbi_packed, exact_forward_backward)
        return pack_emissions, decode_packed, viterbi_packed, exact_forward_backward
