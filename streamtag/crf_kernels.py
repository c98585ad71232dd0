"""Compiled (numba) Viterbi, forward-backward and n-best for the decode hot path; same results as crf.py's numpy code.

The kernels take a flat batch (E (N, L), lengths (B,)), order its sequences by length and cut them
into chunks of about _CHUNK_TOKENS tokens (sequences of about one length together: few time steps,
each wide, so the per-step overhead is paid less often). Each chunk is put in crf's packed layout (time-major, label-major (L, n): the columns of time
step t are the chunk's sequences still running, longest first) and the per-step loops of `crf` run
in compiled code. Viterbi: each step first finds every column's best previous label; where it leads
clearly (crf._MaxPlus's test, ~99% of columns on demo lines) a next label reachable from every label
takes one add instead of a maximum over L moves, the others a maximum over their allowed moves; the
innermost loops run over the step's columns (sequences), which the compiler turns into SIMD code,
where numpy pays a call and a temporary per small block. Forward-backward: each step's sums over
labels are one small matrix product (L, L) x (L, w) (np.dot, i.e. SciPy's BLAS, on contiguous copies
of the step's columns); per (label, label) pair loops cost ~3x more, in loop overhead on steps of
~20-60 columns. (Measured alternatives: walking one sequence
at a time with the 19-label loop innermost does not vectorise and was 3-4x slower; one chunk for a
whole batch of 1000 lines does not stay in cache and was 15-30% slower.)

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
# A token's sum of scaled alpha * beta above this is a normal float with full precision, so its
# marginal is taken as a ratio of scaled values.
_SAFE_SUM = 1e-280
_NEG_INF = -np.inf
# Tokens per chunk of sequences: a chunk's packed arrays (3 x L x chunk doubles) stay in the
# second-level cache; a whole batch's did not and made the kernels memory-bound.
_CHUNK_TOKENS = 1024
# error_model "numpy": a division by zero gives inf (checked afterwards) instead of a test per division.
_OPTIONS = {"nogil": True, "error_model": "numpy"}


def _jit(function):
    """A helper, compiled into the kernels that call it (their cache holds its machine code)."""
    return numba.njit(cache=False, **_OPTIONS)(function)


@_jit
def same_run(stored, at, source, first, count):
    """Whether stored[at:at + count] equals source[first:first + count] item by item: the key check of
    the compiled hash tables (tokenizer pieces, token types), whatever their item types."""
    for i in range(count):
        if stored[at + i] != source[first + i]:
            return False
    return True


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


# exp(x) for x <= 0 in compiled loops that vectorise (numba calls the C library's exp one value at a
# time): x = m ln 2 + r with m = round(x / ln 2), |r| <= ln(2) / 2, exp(r) by its Taylor polynomial to
# degree 13 (truncation below 1e-17 relative), times 2**m built in the exponent bits. Measured within
# one unit in the last place of the correctly rounded value, as numpy's exp (long double reference).
_LOG2E = 1.4426950408889634
# ln 2 split in two (Cody and Waite 1980; the constants of the Cephes library's exp): m * _LN2_HIGH
# is exact for |m| < 2**11, so r keeps its precision.
_LN2_HIGH = 6.93145751953125e-01
_LN2_LOW = 1.42860682030941723212e-06
# Adding 1.5 * 2**52 rounds a double of magnitude below 2**51 to an integer, which then sits in the
# low bits of the sum's bit pattern.
_ROUND = 6755399441055744.0
_ROUND_BITS = 0x4338000000000000
# Below this 2**m would leave the normal range; such values (and NaN) take the library's exp.
_EXP_FLOOR = -708.0


@_jit
def _gather_factors(flat, rows, Ep, factors, peaks, powers):
    """Packed chunk Ep (L, n) = flat[rows] (N, L) as columns, peaks (n,) each token's maximum (-inf if
    none; NaN entries skipped: they make the scaled sums NaN, which the kernels catch) and
    factors (L, n) = exp(Ep - peaks). A token without a finite maximum gives NaN factors (flagged).

    One pass over the chunk's rows of flat (a token's L values are contiguous, its peak their
    maximum), then one per label row of the chunk with powers (n,) as scratch, which stays in the
    first-level cache (a whole (L, n) scratch block did not).
    """
    n_labels = flat.shape[1]
    n_cols = rows.size
    for col in range(n_cols):
        row = rows[col]
        peak = _NEG_INF
        for j in range(n_labels):
            value = flat[row, j]
            Ep[j, col] = value
            peak = value if value > peak else peak
        peaks[col] = peak
    bits = powers.view(np.int64)
    for j in range(n_labels):
        values = Ep[j]
        out = factors[j]
        out_of_range = 0
        for col in range(n_cols):
            x = values[col] - peaks[col]
            out_of_range += not x >= _EXP_FLOOR
            x = x if x >= _EXP_FLOOR else _EXP_FLOOR
            shifted = x * _LOG2E + _ROUND
            m = shifted - _ROUND
            r = x - m * _LN2_HIGH - m * _LN2_LOW
            p = 1.0 / 6227020800.0
            p = p * r + 1.0 / 479001600.0
            p = p * r + 1.0 / 39916800.0
            p = p * r + 1.0 / 3628800.0
            p = p * r + 1.0 / 362880.0
            p = p * r + 1.0 / 40320.0
            p = p * r + 1.0 / 5040.0
            p = p * r + 1.0 / 720.0
            p = p * r + 1.0 / 120.0
            p = p * r + 1.0 / 24.0
            p = p * r + 1.0 / 6.0
            p = p * r + 0.5
            p = p * r + 1.0
            out[col] = p * r + 1.0
            powers[col] = shifted
        for col in range(n_cols):  # the bits of 2**m: biased exponent m + 1023, zero mantissa
            bits[col] = (bits[col] - _ROUND_BITS + 1023) << 52
        for col in range(n_cols):
            out[col] *= powers[col]
        if out_of_range:
            for col in range(n_cols):
                x = values[col] - peaks[col]
                if not x >= _EXP_FLOOR:
                    out[col] = np.exp(x)


# ----------------------------------------------------------------------------------------------------
# Chunks in the packed layout


@_jit
def _chunk_end(lengths, order, first):
    """End (exclusive, in order) of the chunk starting at order[first]: at least one sequence, at
    most _CHUNK_TOKENS tokens otherwise. order (B,): the sequences by decreasing length, so a chunk
    holds sequences of about one length (few time steps, wide ones: less overhead per step)."""
    end = first + 1
    tokens = lengths[order[first]]
    while end < order.size and tokens + lengths[order[end]] <= _CHUNK_TOKENS:
        tokens += lengths[order[end]]
        end += 1
    return end


@_jit
def _by_length(lengths):
    """(B,) sequence indices by decreasing length, ties in index order."""
    return np.argsort(-lengths, kind="mergesort")


@_jit
def _chunk_layout(offsets, lengths, seqs):
    """Packed layout of the sequences seqs (S,), given by decreasing length (crf._Packing, one chunk).

    Column step_start[t] + r holds time step t of seqs[r].
    Returns batch_sizes (T,), step_start (T + 1,), rows (n,) the flat row of each column, seq_of_col
    (n,), last_cols (S,) the last column of each non-empty sequence and last_seqs (S,) its index.
    The order of sequences does not change any result: each column depends on its own sequence only.
    """
    count = seqs.size
    max_len = lengths[seqs[0]]
    batch_sizes = np.zeros(max_len, dtype=np.int64)
    n_nonempty = 0
    for r in range(count):
        n = lengths[seqs[r]]
        if n > 0:
            n_nonempty += 1
        for t in range(n):
            batch_sizes[t] += 1
    step_start = np.zeros(max_len + 1, dtype=np.int64)
    for t in range(max_len):
        step_start[t + 1] = step_start[t] + batch_sizes[t]
    n_cols = step_start[max_len]
    rows = np.empty(n_cols, dtype=np.int64)
    seq_of_col = np.empty(n_cols, dtype=np.int64)
    last_cols = np.empty(n_nonempty, dtype=np.int64)
    last_seqs = np.empty(n_nonempty, dtype=np.int64)
    for r in range(n_nonempty):  # non-empty sequences come first in the sorted order
        seq = seqs[r]
        n = lengths[seq]
        for t in range(n):
            col = step_start[t] + r
            rows[col] = offsets[seq] + t
            seq_of_col[col] = seq
        last_cols[r] = step_start[n - 1] + r
        last_seqs[r] = seq
    return batch_sizes, step_start, rows, seq_of_col, last_cols, last_seqs


@_jit
def _gather(flat, rows):
    """flat (N, L) rows -> (L, n) packed columns: packed[:, c] = flat[rows[c]]."""
    n_labels = flat.shape[1]
    packed = np.empty((n_labels, rows.size))
    for col in range(rows.size):
        row = rows[col]
        for j in range(n_labels):
            packed[j, col] = flat[row, j]
    return packed


@_jit
def _offsets(lengths):
    offsets = np.zeros(lengths.size, dtype=np.int64)
    for b in range(1, lengths.size):
        offsets[b] = offsets[b - 1] + lengths[b - 1]
    return offsets


# ----------------------------------------------------------------------------------------------------
# Viterbi


@_jit
def _max_plus_tables(trans):
    """Tables for the Viterbi step max_i (delta[i] + trans[i, j]), trans (L, L).

    Returns is_dense (L,) bool and dense_labels (D,): the next labels every label may precede (trans[:, j] all finite);
    dense_moves (L, D): trans[i, dense_labels], the moves from i into them; need (L,): need[i] = the
    largest trans[k, j] - trans[i, j] over dense j and k != i, the lead previous label i must have over
    every other for its move to win every dense j (-inf if there is no other label); pred_start
    (L + 1,), pred_label (K,), pred_step (K,): for each next label j, its allowed previous labels
    (trans[i, j] != -inf) ascending and their moves, at pred_start[j]:pred_start[j + 1].
    """
    n_labels = trans.shape[0]
    is_dense = np.zeros(n_labels, dtype=np.bool_)
    pred_start = np.zeros(n_labels + 1, dtype=np.int64)
    for j in range(n_labels):
        finite = True
        count = 0
        for i in range(n_labels):
            finite = finite and np.isfinite(trans[i, j])
            count += trans[i, j] != _NEG_INF
        is_dense[j] = finite
        pred_start[j + 1] = pred_start[j] + count
    dense_labels = np.flatnonzero(is_dense)
    dense_moves = np.empty((n_labels, dense_labels.size))
    need = np.full(n_labels, _NEG_INF)
    for i in range(n_labels):
        for d in range(dense_labels.size):
            j = dense_labels[d]
            dense_moves[i, d] = trans[i, j]
            for k in range(n_labels):
                if k != i:
                    need[i] = max(need[i], trans[k, j] - trans[i, j])
    pred_label = np.empty(pred_start[n_labels], dtype=np.int64)
    pred_step = np.empty(pred_start[n_labels])
    for j in range(n_labels):
        at = pred_start[j]
        for i in range(n_labels):
            if trans[i, j] != _NEG_INF:
                pred_label[at] = i
                pred_step[at] = trans[i, j]
                at += 1
    return is_dense, dense_labels, dense_moves, need, pred_start, pred_label, pred_step


@_jit
def _viterbi_forward(Ep, batch_sizes, step_start, trans, start, delta, tables, top, second, leaders):
    """delta (L, n) packed: delta[t, j] = max_i (delta[t-1, i] + trans[i, j]) + E[t, j], as crf does.

    tables: `_max_plus_tables(trans)`; top, second (n,) float are scratch. leaders (n,) int64 gets, for each
    column with a successor, its clear leader (see below) or -1 (none, or no dense labels: not written).
    Most columns have a clear leader, as in crf._MaxPlus: if the best previous label i of a column
    leads the runner-up by more than need[i], the move from i is the largest (or an equal value)
    for every dense next label j, so delta[t, j] = delta[t-1, i] + trans[i, j] + E[t, j], one add
    instead of L maxima. (Rounding is monotonic, so the computed lead > need implies the exact one; an
    exact sum that is larger never rounds below another.) Other columns and next labels with forbidden
    moves take the maxima over their allowed previous labels, in label order. A NaN candidate never wins
    either way (a strict comparison), so the values are those of the full maxima bit for bit.
    """
    is_dense, dense_labels, dense_moves, need, pred_start, pred_label, pred_step = tables
    n_labels = Ep.shape[0]
    n_dense = dense_labels.size
    votes = np.zeros(n_labels, dtype=np.int64)
    if batch_sizes.size == 0:
        return
    for j in range(n_labels):
        for col in range(batch_sizes[0]):
            delta[j, col] = start[j] + Ep[j, col]
    for t in range(1, batch_sizes.size):
        cur, prev, width = step_start[t], step_start[t - 1], batch_sizes[t]
        if n_dense:
            best = top[:width]
            runner_up = second[:width]
            best[:] = _NEG_INF
            runner_up[:] = _NEG_INF
            for i in range(n_labels):  # the two largest previous scores per column (NaN never enters)
                source = delta[i, prev:prev + width]
                for r in range(width):
                    value = source[r]
                    old = best[r]
                    low = old if old < value else value
                    runner_up[r] = low if low > runner_up[r] else runner_up[r]
                    best[r] = value if value > old else old
            # Each column's leader (the first label with the best score) if it is clear, else -1.
            votes[:] = 0
            for r in range(width):
                value = best[r]
                leader = 0
                while leader < n_labels - 1 and not delta[leader, prev + r] == value:
                    leader += 1
                if value - runner_up[r] > need[leader]:
                    leaders[prev + r] = leader
                    votes[leader] += 1
                else:
                    leaders[prev + r] = -1
            common = np.argmax(votes)
            # Rows of dense labels as if every column's leader were the common one, then the others.
            for d in range(n_dense):
                j = dense_labels[d]
                move = dense_moves[common, d]
                row = delta[j, cur:cur + width]
                emission = Ep[j, cur:cur + width]
                for r in range(width):
                    row[r] = best[r] + move + emission[r]
            for r in range(width):
                leader = leaders[prev + r]
                if leader == common:
                    continue
                if leader >= 0:
                    moves = dense_moves[leader]
                    for d in range(n_dense):
                        j = dense_labels[d]
                        delta[j, cur + r] = best[r] + moves[d] + Ep[j, cur + r]
                else:
                    for d in range(n_dense):
                        j = dense_labels[d]
                        value = _NEG_INF
                        for i in range(n_labels):
                            candidate = delta[i, prev + r] + trans[i, j]
                            value = candidate if candidate > value else value
                        delta[j, cur + r] = value + Ep[j, cur + r]
        for j in range(n_labels):
            if is_dense[j]:
                continue
            row = delta[j, cur:cur + width]
            emission = Ep[j, cur:cur + width]
            first, count = pred_start[j], pred_start[j + 1] - pred_start[j]
            if count == 2:  # I-X under BIO: from B-X or I-X; one pass instead of four
                step, other_step = pred_step[first], pred_step[first + 1]
                source = delta[pred_label[first], prev:prev + width]
                other = delta[pred_label[first + 1], prev:prev + width]
                for r in range(width):
                    value = source[r] + step
                    value = value if value > _NEG_INF else _NEG_INF
                    candidate = other[r] + other_step
                    row[r] = (candidate if candidate > value else value) + emission[r]
                continue
            out = second[:width]  # scratch: the maxima over the allowed moves into j
            out[:] = _NEG_INF
            for p in range(first, first + count):
                step = pred_step[p]
                source = delta[pred_label[p], prev:prev + width]
                for r in range(width):
                    candidate = source[r] + step
                    out[r] = candidate if candidate > out[r] else out[r]
            for r in range(width):
                row[r] = out[r] + emission[r]


@_jit
def _viterbi_backtrace(delta, batch_sizes, step_start, last_packed, trans, end, labels, final_scores, leaders,
                       tables):
    """Labels (N,) packed and the path score of each non-empty sequence (in last_packed's order).

    The last label is the first argmax of delta + end; walking back, each label is the first argmax
    of delta[t] + trans[:, next label], as in crf (no back-pointers are stored). Where the forward pass
    found a clear leader l for the column (leaders, see `_viterbi_forward`) and the next label is dense,
    no move beats l's, so the first argmax is l or an earlier label whose sum rounds to the same value
    (or label 0 if its sum is NaN, which no comparison replaces): only labels below l are looked at.
    Otherwise the scan starts at label 0 and looks at the allowed moves into the next label only: a
    forbidden move's sum is -inf or NaN, which never replaces the best so far.
    """
    is_dense, _, _, _, pred_start, pred_label, _ = tables
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
            col = cur + r
            leader = leaders[col]
            if leader >= 0 and is_dense[following]:
                label = leader
                if leader > 0:
                    top = delta[leader, col] + trans[leader, following]
                    for i in range(leader):
                        value = delta[i, col] + trans[i, following]
                        if value == top or (i == 0 and value != value):
                            label = i
                            break
                labels[col] = label
                continue
            label = 0
            top = delta[0, col] + trans[0, following]
            for p in range(pred_start[following], pred_start[following + 1]):
                i = pred_label[p]
                value = delta[i, col] + trans[i, following]
                if value > top:
                    top = value
                    label = i
            labels[col] = label


@_jit
def _viterbi(Ep, batch_sizes, step_start, last_cols, rows, trans, start, end, delta, labels_out, tables):
    """Viterbi on one packed chunk: writes labels_out[rows[c]] (flat (N,)), returns scores (S,) in
    last_cols' order. delta (L, n) is scratch."""
    labels = np.zeros(Ep.shape[1], dtype=np.int64)
    final_scores = np.empty(last_cols.size)
    n_cols = Ep.shape[1]
    leaders = np.empty(n_cols, dtype=np.int64)
    _viterbi_forward(Ep, batch_sizes, step_start, trans, start, delta, tables, np.empty(n_cols), np.empty(n_cols),
                     leaders)
    _viterbi_backtrace(delta, batch_sizes, step_start, last_cols, trans, end, labels, final_scores, leaders, tables)
    for col in range(rows.size):
        labels_out[rows[col]] = labels[col]
    return final_scores


@_jit_cached
def viterbi_flat(E, lengths, trans, start, end):
    """Best paths: E (N, L) flat, lengths (B,) -> labels (N,) int64, scores (B,) (0 if empty)."""
    n_tokens = E.shape[0]
    labels = np.zeros(n_tokens, dtype=np.int64)
    scores = np.zeros(lengths.size)
    offsets = _offsets(lengths)
    tables = _max_plus_tables(trans)
    order = _by_length(lengths)
    first = 0
    while first < order.size:
        end_of_chunk = _chunk_end(lengths, order, first)
        batch_sizes, step_start, rows, _, last_cols, last_seqs = _chunk_layout(offsets, lengths,
                                                                               order[first:end_of_chunk])
        Ep = _gather(E, rows)
        final_scores = _viterbi(Ep, batch_sizes, step_start, last_cols, rows, trans, start, end,
                                np.empty(Ep.shape), labels, tables)
        for k in range(last_seqs.size):
            scores[last_seqs[k]] = final_scores[k]
        first = end_of_chunk
    return labels, scores


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
def _scaled_forward(Ep, emission_exp, peak, batch_sizes, step_start, seq_of_col, trans, trans_exp_t, trans_shift,
                    start, start_exp, start_shift, alpha, alpha_shift, suspect, sums_buffer, carry_buffer, totals, lows):
    """alpha (L, n) packed, scaled to sum 1 per column, with log scale alpha_shift (n,). Flags suspect
    sequences.

    Each step's sums over the previous labels are one small matrix product, trans_exp_t (L, L) (the
    transposed factors) times the previous step's scaled alpha (L, w), which the step before left
    contiguous in carry_buffer; sums_buffer holds L x n values, carry_buffer 2 x L x n. Forbidden moves
    have factor 0 and add exact zeros (the scaled values are finite, else the sequence is suspect).
    """
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
    n_cols = Ep.shape[1]
    half = n_labels * n_cols
    carry_at = 0
    if batch_sizes.size > 1:
        width = batch_sizes[1]
        carry = carry_buffer[:n_labels * width].reshape((n_labels, width))
        for j in range(n_labels):
            carry[j] = alpha[j, :width]
    for t in range(1, batch_sizes.size):
        cur, prev, width = step_start[t], step_start[t - 1], batch_sizes[t]
        previous = carry_buffer[carry_at:carry_at + n_labels * width].reshape((n_labels, width))
        sums = sums_buffer[:n_labels * width].reshape((n_labels, width))
        np.dot(trans_exp_t, previous, sums)
        totals[:width] = 0.0
        lows[:width] = np.inf
        for j in range(n_labels):
            acc = sums[j]
            emission = emission_exp[j, cur:cur + width]
            for r in range(width):
                value = acc[r] * emission[r]
                acc[r] = value
                totals[r] += value
                lows[r] = value if value < lows[r] else lows[r]
        for r in range(width):
            col, prev_col = cur + r, prev + r
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
        following = batch_sizes[t + 1] if t + 1 < batch_sizes.size else 0
        carry_at = half - carry_at  # the two halves of carry_buffer take turns
        carry = carry_buffer[carry_at:carry_at + n_labels * following].reshape((n_labels, following))
        for j in range(n_labels):
            acc = sums[j]
            out = alpha[j, cur:cur + width]
            for r in range(width):
                out[r] = acc[r] * totals[r]
            kept = carry[j]
            for r in range(following):
                kept[r] = out[r]


@_jit
def _scaled_backward(Ep, emission_exp, peak, batch_sizes, step_start, last_packed, seq_of_col, trans,
                     trans_exp, trans_shift, end, end_exp, end_shift, beta, beta_shift, suspect, sums_buffer,
                     weighted_buffer, totals, lows, col_slot, follow_rows, follow_shift):
    """beta (L, n) packed, scaled per column, with log scale beta_shift (n,). Flags suspect sequences.

    Each step's sums over the next labels are one small matrix product, trans_exp (L, L) times the
    step's weighted columns E * beta (L, w), contiguous in weighted_buffer (sums_buffer and
    weighted_buffer hold L x n values each).
    Columns with col_slot[col] >= 0 (past the first step) also get their weighted row E * beta
    (scaled) written to follow_rows[slot] (L,) and its log scale (beta_shift + emission peak) to
    follow_shift[slot], while the step is in cache: one contiguous row per token instead of L
    cache lines of the packed block when span_log_prob reads it.
    """
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
        cur, prev, width = step_start[t], step_start[t - 1], batch_sizes[t]
        weighted = weighted_buffer[:n_labels * width].reshape((n_labels, width))
        sums = sums_buffer[:n_labels * width].reshape((n_labels, width))
        for j in range(n_labels):
            after = weighted[j]
            emission = emission_exp[j, cur:cur + width]
            scaled = beta[j, cur:cur + width]
            for r in range(width):
                after[r] = emission[r] * scaled[r]
        for r in range(width):  # a token after a decoded entity: keep its row for span_log_prob
            slot = col_slot[cur + r]
            if slot >= 0:
                for j in range(n_labels):
                    follow_rows[slot, j] = weighted[j, r]
                follow_shift[slot] = beta_shift[cur + r] + peak[cur + r]
        np.dot(trans_exp, weighted, sums)
        totals[:width] = 0.0
        lows[:width] = np.inf
        for i in range(n_labels):
            acc = sums[i]
            for r in range(width):
                totals[r] += acc[r]
                lows[r] = acc[r] if acc[r] < lows[r] else lows[r]
        for r in range(width):
            col, prev_col = cur + r, prev + r
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
            acc = sums[i]
            out = beta[i, prev:prev + width]
            for r in range(width):
                out[r] = acc[r] * totals[r]


@_jit
def _follow_slots(rows, seq_of_col, offsets, labels, col_slot, follow_slot, n_follow):
    """col_slot (n,): a new slot for each column whose token follows a token of its sequence decoded
    other than O (label 0), else -1; recorded in follow_slot (N,) by token. Returns the slot count."""
    for col in range(rows.size):
        row = rows[col]
        if row > offsets[seq_of_col[col]] and labels[row - 1] != 0:
            col_slot[col] = n_follow
            follow_slot[row] = n_follow
            n_follow += 1
        else:
            col_slot[col] = -1
    return n_follow


@_jit
def _confidence_and_row_map(alpha, alpha_shift, beta, beta_shift, step_start, seqs, offsets, lengths, labels, log_z,
                            block, sums, confidence, row_base, row_stride, alpha_shift_flat, beta_shift_flat,
                            alpha_of_label):
    """Per token of a chunk (packed (L, n) alpha and beta, kept where they are): the marginal of its
    decoded label, where its entries lie in the batch's buffers, and its shifts in flat order.

    The marginal is alpha[y] * beta[y] / sum_j alpha[j] * beta[j] of the scaled values (the shifts
    cancel, so no exp or log per token). If that sum is below _SAFE_SUM (scaled alpha and beta
    disagree by hundreds of orders of magnitude, where the ratio could lose digits), the token takes
    the log-space formula exp(log alpha + log beta - log Z) instead, as crf's numpy code does.
    Entry (row, j) of the chunk is at buffer index row_base[row] + j * row_stride[row] (block: the
    chunk's first index in the buffers). sums (n,) is scratch. alpha_of_label (N,) gets each token's
    scaled alpha at its decoded label (where span_log_prob starts a decoded span), in flat order.
    Tokens are visited in flat order, sequence by sequence (seqs (S,): the chunk's non-empty sequences,
    column r of each step): the flat arrays are written in runs instead of one line per token.
    """
    n_labels, n_cols = alpha.shape
    sums[:] = 0.0
    j = 0
    while j + 3 <= n_labels:  # three labels a pass (same order of additions): fewer passes over sums
        a0, b0, a1, b1, a2, b2 = alpha[j], beta[j], alpha[j + 1], beta[j + 1], alpha[j + 2], beta[j + 2]
        for col in range(n_cols):
            total = sums[col]
            total += a0[col] * b0[col]
            total += a1[col] * b1[col]
            sums[col] = total + a2[col] * b2[col]
        j += 3
    while j < n_labels:
        a = alpha[j]
        b = beta[j]
        for col in range(n_cols):
            sums[col] += a[col] * b[col]
        j += 1
    for r in range(seqs.size):
        seq = seqs[r]
        first = offsets[seq]
        for t in range(lengths[seq]):
            col = step_start[t] + r
            row = first + t
            label = labels[row]
            total = sums[col]
            scaled_alpha = alpha[label, col]
            if total >= _SAFE_SUM:
                marginal = scaled_alpha * beta[label, col] / total
            else:
                marginal = np.exp(np.log(scaled_alpha) + np.log(beta[label, col]) + alpha_shift[col]
                                  + beta_shift[col] - log_z[seq])
            confidence[row] = marginal if marginal < 1.0 else 1.0
            alpha_of_label[row] = scaled_alpha
            row_base[row] = block + col
            row_stride[row] = n_cols
            alpha_shift_flat[row] = alpha_shift[col]
            beta_shift_flat[row] = beta_shift[col]


@_jit_cached
def decode_flat(E, lengths, trans, start, end):
    """Viterbi and scaled forward-backward over a flat batch, chunk by chunk in the packed layout.

    E (N, L) emissions, lengths (B,); trans (L, L), start (L,), end (L,) masked.
    Returns labels (N,), scores (B,), alpha (N * L,) and beta (N * L,) buffers, row_base (N,) and
    row_stride (N,): the scaled alpha of token t, label j is alpha[row_base[t] + j * row_stride[t]]
    (each chunk's packed (L, n) block, left in place: writing them out row by row cost as much as
    the recursions), alpha_shift (N,) with log_alpha[t, j] = log(that) + alpha_shift[t], likewise beta
    and beta_shift, log Z (B,), suspect (B,) bool: sequences whose scaled values are not trustworthy
    (redo them with `exact_forward_backward`), and confidence (N,): the marginal of each token's
    decoded label (not meaningful in suspect sequences). Empty sequences get score 0 and log Z 0.
    Then follow_slot (N,), follow_rows (M, L), follow_shift (M,): each token whose previous token's
    decoded label is not O (label 0), i.e. each token that can follow a decoded span, has its scaled
    E * beta row at follow_rows[follow_slot[t]] (-1: none), with log(E[t, j]) + log_beta[t, j] =
    log(follow_rows[slot, j]) + follow_shift[slot] (`span_log_prob_scaled` reads them); alpha_of_label
    (N,): each token's scaled alpha at its decoded label (a span's first token, in flat order).
    """
    n_tokens, n_labels = E.shape
    labels = np.zeros(n_tokens, dtype=np.int64)
    scores = np.zeros(lengths.size)
    log_z = np.zeros(lengths.size)
    suspect = np.zeros(lengths.size, dtype=np.bool_)
    alpha_buffer = np.empty(n_tokens * n_labels)
    beta_buffer = np.empty(n_tokens * n_labels)
    alpha_shift_flat = np.empty(n_tokens)
    beta_shift_flat = np.empty(n_tokens)
    row_base = np.zeros(n_tokens, dtype=np.int64)
    row_stride = np.ones(n_tokens, dtype=np.int64)
    confidence = np.zeros(n_tokens)
    follow_slot = np.full(n_tokens, -1, dtype=np.int64)
    follow_rows = np.empty((n_tokens, n_labels))
    follow_shift = np.empty(n_tokens)
    alpha_of_label = np.empty(n_tokens)
    n_follow = 0
    trans_exp, trans_shift = _exp_shifted(trans)
    start_exp, start_shift = _exp_shifted(start)
    end_exp, end_shift = _exp_shifted(end)
    trans_exp_t = np.ascontiguousarray(trans_exp.T)
    offsets = _offsets(lengths)
    # Scratch for the largest chunk, sliced per chunk (an allocation per chunk costs more than the slice).
    max_cols = min(n_tokens, max(_CHUNK_TOKENS, lengths.max() if lengths.size else 0))
    sums = np.empty(n_labels * max_cols)
    carry = np.empty(2 * n_labels * max_cols)
    weighted = np.empty(n_labels * max_cols)
    totals = np.empty(max_cols)
    lows = np.empty(max_cols)
    packed_buffer = np.empty(n_labels * max_cols)
    factors_buffer = np.empty(n_labels * max_cols)
    peaks_buffer = np.empty(max_cols)
    powers = np.empty(max_cols)
    alpha_shift_buffer = np.empty(max_cols)
    beta_shift_buffer = np.empty(max_cols)
    chunk_labels = np.zeros(max_cols, dtype=np.int64)
    col_slot_buffer = np.empty(max_cols, dtype=np.int64)
    marginal_sums = np.empty(max_cols)
    final_scores_buffer = np.empty(max_cols)
    tables = _max_plus_tables(trans)
    top = np.empty(max_cols)
    second = np.empty(max_cols)
    leaders = np.empty(max_cols, dtype=np.int64)
    block = 0
    order = _by_length(lengths)
    first = 0
    while first < order.size:
        end_of_chunk = _chunk_end(lengths, order, first)
        batch_sizes, step_start, rows, seq_of_col, last_cols, last_seqs = _chunk_layout(
            offsets, lengths, order[first:end_of_chunk])
        first = end_of_chunk
        n_cols = rows.size
        if n_cols == 0:
            continue
        Ep = packed_buffer[:n_labels * n_cols].reshape((n_labels, n_cols))
        factors = factors_buffer[:n_labels * n_cols].reshape((n_labels, n_cols))
        peaks = peaks_buffer[:n_cols]
        _gather_factors(E, rows, Ep, factors, peaks, powers)
        alpha = alpha_buffer[block:block + n_labels * n_cols].reshape((n_labels, n_cols))
        beta = beta_buffer[block:block + n_labels * n_cols].reshape((n_labels, n_cols))
        alpha_shift = alpha_shift_buffer[:n_cols]
        beta_shift = beta_shift_buffer[:n_cols]
        # Viterbi's scores go in beta's block, which the backward pass overwrites afterwards.
        _viterbi_forward(Ep, batch_sizes, step_start, trans, start, beta, tables, top, second, leaders)
        final_scores = final_scores_buffer[:last_cols.size]
        _viterbi_backtrace(beta, batch_sizes, step_start, last_cols, trans, end, chunk_labels, final_scores, leaders,
                           tables)
        for col in range(n_cols):
            labels[rows[col]] = chunk_labels[col]
        _scaled_forward(Ep, factors, peaks, batch_sizes, step_start, seq_of_col, trans, trans_exp_t, trans_shift,
                        start, start_exp, start_shift, alpha, alpha_shift, suspect, sums, carry, totals, lows)
        for k in range(last_cols.size):
            col, seq = last_cols[k], last_seqs[k]
            scores[seq] = final_scores[k]
            total = 0.0
            for j in range(n_labels):
                total += alpha[j, col] * end_exp[j]
            if not (_TINY <= total < np.inf):
                suspect[seq] = True
                total = 1.0
            log_z[seq] = alpha_shift[col] + end_shift + np.log(total)
        col_slot = col_slot_buffer[:n_cols]
        n_follow = _follow_slots(rows, seq_of_col, offsets, labels, col_slot, follow_slot, n_follow)
        _scaled_backward(Ep, factors, peaks, batch_sizes, step_start, last_cols, seq_of_col, trans, trans_exp,
                         trans_shift, end, end_exp, end_shift, beta, beta_shift, suspect, sums, weighted, totals, lows,
                         col_slot, follow_rows, follow_shift)
        _confidence_and_row_map(alpha, alpha_shift, beta, beta_shift, step_start, last_seqs, offsets, lengths, labels,
                                log_z, block, marginal_sums[:n_cols], confidence, row_base, row_stride, alpha_shift_flat,
                                beta_shift_flat, alpha_of_label)
        block += n_labels * n_cols
    return (labels, scores, alpha_buffer, beta_buffer, row_base, row_stride, alpha_shift_flat, beta_shift_flat,
            log_z, suspect, confidence, follow_slot, follow_rows[:n_follow], follow_shift[:n_follow], alpha_of_label)


# ----------------------------------------------------------------------------------------------------
# Span probability from the scaled forward-backward


# A span's sum over the labels after it, taken from the scaled E * beta row, is trusted from this
# size up: terms that underflowed to 0 (each below ~1e-290) are then under 1e-90 of the sum.
_FOLLOW_SAFE = 1e-200


@_jit
def _log_entry(scaled, shift, row_base, row_stride, exact_tokens, exact, token, label):
    """log alpha (or beta) of (token, label) from decode_flat's buffers, or the exact row if the
    token's sequence was redone in log space (exact_tokens ascending)."""
    if exact_tokens.size:
        where = np.searchsorted(exact_tokens, token)
        if where < exact_tokens.size and exact_tokens[where] == token:
            return exact[where, label]
    value = scaled[row_base[token] + label * row_stride[token]]
    return np.log(value) + shift[token] if value > 0.0 else _NEG_INF


@_jit
def _is_exact_row(exact_tokens, token):
    if not exact_tokens.size:
        return False
    where = np.searchsorted(exact_tokens, token)
    return where < exact_tokens.size and exact_tokens[where] == token


@_jit
def _log_following(E, trans, trans_exp, trans_shift, beta, beta_shift, row_base, row_stride, exact_tokens,
                   exact_beta, follow_slot, follow_rows, follow_shift, token, last, skip, terms):
    """log sum_{j != skip} exp(trans[last, j] + E[token, j] + log beta[token, j]): the label after a
    span (anything but I-X). terms (L,) is scratch.

    From the token's scaled E * beta row if decode kept one: sum_j trans_exp[last, j] * row[j], no
    exp per label. If there is none, the token's row is exact, or that sum is below _FOLLOW_SAFE,
    every term is taken in log space, as crf's numpy code does.
    """
    n_labels = E.shape[1]
    slot = follow_slot[token]
    if slot >= 0 and not _is_exact_row(exact_tokens, token):
        total = 0.0
        for j in range(n_labels):
            if j != skip:
                total += trans_exp[last, j] * follow_rows[slot, j]
        if _FOLLOW_SAFE <= total < np.inf:
            return np.log(total) + trans_shift + follow_shift[slot]
    for j in range(n_labels):
        terms[j] = trans[last, j] + E[token, j] + _log_entry(beta, beta_shift, row_base, row_stride, exact_tokens,
                                                             exact_beta, token, j)
    terms[skip] = _NEG_INF
    peak = _NEG_INF
    for j in range(n_labels):
        if terms[j] > peak:
            peak = terms[j]
    if not np.isfinite(peak):  # as crf._peak: shift by 0 (all -inf gives -inf)
        peak = 0.0
    total = 0.0
    for j in range(n_labels):
        total += np.exp(terms[j] - peak)
    return np.log(total) + peak if total > 0.0 else _NEG_INF


@_jit_cached
def span_log_prob_scaled(alpha, beta, row_base, row_stride, alpha_shift, beta_shift, exact_tokens, exact_alpha,
                         exact_beta, follow_slot, follow_rows, follow_shift, decoded, alpha_of_label, log_z, E, offsets,
                         lengths, trans, end, seq, first, stop, b_label, i_label):
    """`crf.span_log_prob` on decode_flat's scaled forward-backward (see crf.ScaledForwardBackward for
    the buffers, the exact rows and the follow rows; decoded (N,) the labels decode_flat gave, of which
    alpha_of_label (N,) holds the scaled alphas), for spans given by seq, first, stop, b_label,
    i_label (S,) (checked by the caller). A span's first alpha comes from alpha_of_label when the span
    starts on its decoded label (the tagger's spans do: a flat, in-order read), else from the packed block. Returns (S,) log probabilities, -inf for impossible spans;
    the numpy code's sums in its order, but the sum over the label after a span in scaled form.
    """
    n_spans = seq.size
    out = np.empty(n_spans)
    terms = np.empty(E.shape[1])
    trans_exp, trans_shift = _exp_shifted(trans)
    for s in range(n_spans):
        b, first_label, inside_label = seq[s], b_label[s], i_label[s]
        token = offsets[b] + first[s]
        if decoded[token] == first_label and not _is_exact_row(exact_tokens, token):
            value = alpha_of_label[token]
            log_prob = np.log(value) + alpha_shift[token] if value > 0.0 else _NEG_INF
        else:
            log_prob = _log_entry(alpha, alpha_shift, row_base, row_stride, exact_tokens, exact_alpha, token,
                                  first_label)
        n_inside = stop[s] - first[s] - 1
        last = first_label
        if n_inside > 0:
            inside = 0.0
            for t in range(token + 1, token + 1 + n_inside):
                inside += E[t, inside_label]
            log_prob += trans[first_label, inside_label] + inside
            last = inside_label
        if n_inside > 1:
            log_prob += (n_inside - 1) * trans[inside_label, inside_label]
        if stop[s] == lengths[b]:
            log_prob += end[last]
        else:
            log_prob += _log_following(E, trans, trans_exp, trans_shift, beta, beta_shift, row_base, row_stride,
                                       exact_tokens, exact_beta, follow_slot, follow_rows, follow_shift,
                                       offsets[b] + stop[s], last, inside_label, terms)
        out[s] = log_prob - log_z[b] if np.isfinite(log_z[b]) else _NEG_INF
    return out


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
# n-best (list Viterbi)


@_jit
def _insert_top(values, states, value, state):
    """Put (value, state) into the sorted top list values (k,) (best first), given value > values[-1].

    It goes after every entry of equal value: candidates arrive in increasing state order, so ties
    keep the lowest state first, as crf._top_k's repeated argmax does.
    """
    pos = values.size - 1
    while pos > 0 and value > values[pos - 1]:
        values[pos] = values[pos - 1]
        states[pos] = states[pos - 1]
        pos -= 1
    values[pos] = value
    states[pos] = state


@_jit
def _nbest_sequence(E, first, n, trans, start, end, k, delta, back, final_values, final_states):
    """The k best paths of the sequence at rows first..first+n-1 of E (n >= 1): fills delta (n, L, k)
    with the sorted top scores of partial paths ending in each label, back (n, L, k) with the state
    (previous label * k + rank) each came from, and the final top list (k,) of states."""
    n_labels = E.shape[1]
    for j in range(n_labels):
        delta[0, j, 0] = start[j] + E[first, j]
        for r in range(1, k):
            delta[0, j, r] = _NEG_INF
            back[0, j, r] = 0
        back[0, j, 0] = 0
    for t in range(1, n):
        for j in range(n_labels):
            top = delta[t, j]
            came = back[t, j]
            top[:] = _NEG_INF
            came[:] = 0  # a slot without a finite candidate points to state 0, like argmax of all -inf
            for i in range(n_labels):
                step = trans[i, j]
                if step == _NEG_INF:  # only -inf candidates, which never enter the list
                    continue
                for r in range(k):
                    value = delta[t - 1, i, r] + step
                    if not value > top[k - 1]:  # ranks are sorted: no later one enters either
                        break
                    _insert_top(top, came, value, i * k + r)
            emission = E[first + t, j]
            for r in range(k):
                top[r] += emission
    final_values[:] = _NEG_INF
    final_states[:] = 0
    for i in range(n_labels):
        for r in range(k):
            value = delta[n - 1, i, r] + end[i]
            if not value > final_values[k - 1]:
                break
            _insert_top(final_values, final_states, value, i * k + r)


@_jit_cached
def nbest_flat(E, lengths, trans, start, end, k):
    """`crf.nbest` compiled: labels (k, N) int64 (-1 where a sequence has fewer than m+1 finite paths)
    and scores (B, k), best first; same sums, ties and outputs as the numpy code (E, trans, start,
    end without NaN or +inf). One sequence at a time: n-best runs on the few doubtful lines only.
    """
    n_tokens, n_labels = E.shape
    labels = np.full((k, n_tokens), -1, dtype=np.int64)
    scores = np.full((lengths.size, k), _NEG_INF)
    max_len = 0
    for b in range(lengths.size):
        max_len = max(max_len, lengths[b])
    delta = np.empty((max_len, n_labels, k))
    back = np.zeros((max_len, n_labels, k), dtype=np.int64)
    final_values = np.empty(k)
    final_states = np.zeros(k, dtype=np.int64)
    first = 0
    for b in range(lengths.size):
        n = lengths[b]
        if n == 0:
            scores[b, 0] = 0.0  # one empty path
            continue
        _nbest_sequence(E, first, n, trans, start, end, k, delta, back, final_values, final_states)
        for m in range(k):
            scores[b, m] = final_values[m]
            if final_values[m] == _NEG_INF:
                continue
            state = final_states[m]
            for t in range(n - 1, -1, -1):
                label = state // k
                labels[m, first + t] = label
                state = back[t, label, state % k]
        first += n
    return labels, scores


# ----------------------------------------------------------------------------------------------------
# Loading


_LOAD_LOCK = threading.Lock()


def _warm_up(decode, viterbi, exact, nbest, span) -> None:
    """Compile (or load from the cache) the one signature crf uses, on a tiny batch."""
    E = np.zeros((3, 2))
    lengths = np.array([2, 0, 1], dtype=np.int64)
    square, vector = np.zeros((2, 2)), np.zeros(2)
    decoded, _, alpha, beta, row_base, row_stride, alpha_shift, beta_shift, log_z, _, _, follow_slot, follow_rows, \
        follow_shift, alpha_of_label = decode(E, lengths, square, vector, vector)
    one, none = np.zeros(1, dtype=np.int64), np.zeros(0, dtype=np.int64)
    span(alpha, beta, row_base, row_stride, alpha_shift, beta_shift, none, np.zeros((0, 2)), np.zeros((0, 2)),
         follow_slot, follow_rows, follow_shift, decoded, alpha_of_label, log_z, E, np.array([0, 2, 2], dtype=np.int64), lengths, square,
         vector, one, one, one + 1, one, one + 1)
    viterbi(E, lengths, square, vector, vector)
    exact(E, np.array([0, 2, 2], dtype=np.int64), lengths, np.array([0, 1, 2], dtype=np.int64),
          square, vector, vector, np.empty((3, 2)), np.empty((3, 2)), np.zeros(3))
    nbest(E, lengths, square, vector, vector, 2)


def load():
    """(decode_flat, viterbi_flat, exact_forward_backward, nbest_flat, span_log_prob_scaled), compiled;
    call once before using them.

    A cache that cannot be read or written (corrupt files, a folder that became read-only, a full
    disk) must not stop tagging: the kernels are then compiled again without the cache, silently.
    """
    global decode_flat, viterbi_flat, exact_forward_backward, nbest_flat, span_log_prob_scaled
    with _LOAD_LOCK, warnings.catch_warnings():
        warnings.simplefilter("ignore", numba.NumbaWarning)
        try:
            _warm_up(decode_flat, viterbi_flat, exact_forward_backward, nbest_flat, span_log_prob_scaled)
        except Exception:  # noqa: BLE001 - any cache fault; a real compile error recurs below and is raised
            decode_flat = _jit(decode_flat.py_func)
            viterbi_flat = _jit(viterbi_flat.py_func)
            exact_forward_backward = _jit(exact_forward_backward.py_func)
            nbest_flat = _jit(nbest_flat.py_func)
            span_log_prob_scaled = _jit(span_log_prob_scaled.py_func)
            _warm_up(decode_flat, viterbi_flat, exact_forward_backward, nbest_flat, span_log_prob_scaled)
        return decode_flat, viterbi_flat, exact_forward_backward, nbest_flat, span_log_prob_scaled


