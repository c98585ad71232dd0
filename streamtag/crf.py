"""Linear-chain CRF maths on flat token batches: decoding, marginals, span probabilities, NLL + gradient.

Model: p(y | x) = exp(score(y)) / Z with
    score(y) = start[y_0] + sum_t E[t, y_t] + sum_{t>0} trans[y_{t-1}, y_t] + end[y_last].

Every batch function takes emissions ``E`` of shape (N, L) for all tokens of B sequences concatenated and
``lengths`` (B,). Lengths may be 0: an empty sequence has one (empty) path, score 0 and log Z = 0.

Internally the batch is put in a time-major *packed* layout (sequences sorted by decreasing length, the
rows of time step t are the n_t sequences still running, in that order), so the recursions loop over
time steps only and every step is vectorised over the batch. Nothing is padded, so one long line in a
batch of short ones costs no memory.

Forbidden BIO moves are -inf in the masked matrices (see `apply_mask`); trainable parameters never hold
-inf. No function here produces NaN for -inf inputs.

`viterbi`, `decode` and `nbest` (the tagging hot path) run their loops in compiled kernels
(`streamtag.crf_kernels`, numba) when numba can be imported; the numpy code here is the reference they
are tested against and the fallback (set `USE_KERNELS = False` to force it).
"""

from __future__ import annotations

import importlib
import threading
from typing import NamedTuple

import numpy as np

# Use the compiled kernels of streamtag.crf_kernels for `viterbi`, `decode` and `nbest` if numba imports.
USE_KERNELS = True
_kernels = None  # the loaded kernels; False once numba turned out to be unavailable
_loaded: dict = {}  # (kernel module, loader name) -> what it returned, or False (see `compiled`)
_kernels_lock = threading.Lock()

# A scaled sum of exponentials below this may have lost relative precision (sub-normal range) or
# underflowed to 0; such rows are recomputed with an exact (slower) log-sum-exp.
_TINY = 1e-290
# exp() of more than this overflows float64 (log(max float) is about 709.8).
_EXP_LIMIT = 700.0
_TRANSPOSE_BLOCK = 512
_PAIR_BLOCK = 256


class ForwardBackward(NamedTuple):
    """Result of `forward_backward`; all in log space, flat token layout.

    log_alpha (N, L): log of the summed score of all prefixes ending in label j at token t, E[t] included.
    log_beta (N, L): log of the summed score of all suffixes after token t given label j there
        (E[t] excluded, end included), so log_alpha + log_beta - log_z = log marginal.
    log_z (B,): log partition function per sequence (0 for an empty sequence).
    lengths (B,): the sequence lengths, kept so marginals can be computed from this alone.
    """

    log_alpha: np.ndarray
    log_beta: np.ndarray
    log_z: np.ndarray
    lengths: np.ndarray

    def log_alpha_at(self, tokens: np.ndarray, labels: np.ndarray) -> np.ndarray:
        """log_alpha[tokens, labels] (S,), a new array; tokens and labels (S,) ints."""
        return self.log_alpha[tokens, labels]

    def log_beta_rows(self, tokens: np.ndarray) -> np.ndarray:
        """log_beta[tokens] (S, L), a new array; tokens (S,) ints."""
        return self.log_beta[tokens]


class ScaledForwardBackward:
    """What `decode` returns as its forward-backward: `ForwardBackward`'s attributes and methods, kept
    in the kernel's scaled, packed form until asked for.

    log_z (B,) and lengths (B,) are plain attributes. Entry (t, j) of the scaled alpha is
    alpha[row_base[t] + j * row_stride[t]] (alpha, beta: (N * L,) buffers; row_base, row_stride (N,)),
    and log_alpha[t, j] = log(that) + alpha_shift[t]; likewise beta. log_alpha / log_beta (N, L) are
    computed on first access (a gather and a log of every entry, which the tagger's hot path avoids)
    and kept; `log_alpha_at` and `log_beta_rows` compute the entries asked for only. Tokens of
    sequences redone in log space (`exact_tokens` (M,), ascending) have their exact rows in
    `exact_alpha`, `exact_beta` (M, L) instead.
    """

    __slots__ = ("n_labels", "alpha", "beta", "row_base", "row_stride", "alpha_shift", "beta_shift", "log_z",
                 "lengths", "exact_tokens", "exact_alpha", "exact_beta", "follow",
                 "_log_alpha", "_log_beta")

    def __init__(self, n_labels, alpha, beta, row_base, row_stride, alpha_shift, beta_shift, log_z, lengths,
                 exact_tokens=None, exact_alpha=None, exact_beta=None, follow=None):
        self.n_labels = n_labels
        # follow: (follow_slot (N,), follow_rows (M, L), follow_shift (M,), decoded (N,), alpha_of_label
        # (N,)) from the kernel: the scaled E * beta rows of the tokens that can follow a decoded span
        # and each token's scaled alpha at its decoded label, contiguous where span_log_prob reads
        # them (see crf_kernels.decode_flat). None: no such rows (every entry from the packed blocks).
        if follow is None:
            none = np.full(row_base.size, -1, dtype=np.int64)
            follow = (none, np.zeros((0, n_labels)), np.zeros(0), none, np.zeros(row_base.size))
        self.follow = follow
        self.alpha, self.beta, self.row_base, self.row_stride = alpha, beta, row_base, row_stride
        self.alpha_shift, self.beta_shift, self.log_z, self.lengths = alpha_shift, beta_shift, log_z, lengths
        self.exact_tokens = np.zeros(0, dtype=np.int64) if exact_tokens is None else exact_tokens
        self.exact_alpha = np.zeros((0, n_labels)) if exact_alpha is None else exact_alpha
        self.exact_beta = np.zeros((0, n_labels)) if exact_beta is None else exact_beta
        self._log_alpha = self._log_beta = None

    @property
    def log_alpha(self) -> np.ndarray:
        if self._log_alpha is None:
            self._log_alpha = self._log_rows(self.alpha, self.alpha_shift, self.exact_alpha,
                                             np.arange(self.row_base.size))
        return self._log_alpha

    @property
    def log_beta(self) -> np.ndarray:
        if self._log_beta is None:
            self._log_beta = self._log_rows(self.beta, self.beta_shift, self.exact_beta, np.arange(self.row_base.size))
        return self._log_beta

    def log_alpha_at(self, tokens: np.ndarray, labels: np.ndarray) -> np.ndarray:
        """log_alpha[tokens, labels] (S,), a new array, computing only those entries."""
        if self._log_alpha is not None:
            return self._log_alpha[tokens, labels]
        with np.errstate(divide="ignore"):  # an exact zero is a forbidden state: -inf
            values = np.log(self.alpha[self.row_base[tokens] + labels * self.row_stride[tokens]])
        values += self.alpha_shift[tokens]
        if self.exact_tokens.size:
            where, found = self._exact_rows(tokens)
            values[found] = self.exact_alpha[where[found], labels[found]]
        return values

    def log_beta_rows(self, tokens: np.ndarray) -> np.ndarray:
        """log_beta[tokens] (S, L), a new array, computing only those rows."""
        if self._log_beta is not None:
            return self._log_beta[tokens]
        return self._log_rows(self.beta, self.beta_shift, self.exact_beta, tokens)

    def _log_rows(self, scaled, shift, exact, tokens) -> np.ndarray:
        """(S, L) log values of the rows of tokens (S,), from the scaled buffer, exact rows patched in."""
        index = self.row_base[tokens][:, None] + np.arange(self.n_labels) * self.row_stride[tokens][:, None]
        with np.errstate(divide="ignore"):
            values = np.log(scaled[index])
        values += shift[tokens][:, None]
        if self.exact_tokens.size:
            where, found = self._exact_rows(tokens)
            values[found] = exact[where[found]]
        return values

    def _exact_rows(self, tokens: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """(S,) row in the exact arrays of each token, and (S,) bool whether it has one."""
        where = np.searchsorted(self.exact_tokens, tokens)
        where = np.minimum(where, self.exact_tokens.size - 1)
        return where, self.exact_tokens[where] == tokens


# ----------------------------------------------------------------------------------------------------
# Label constraints


def bio_allowed(labels: list[str]) -> tuple[np.ndarray, np.ndarray]:
    """Allowed moves of the BIO scheme (IOB2).

    labels: L strings such as "O", "B-host", "I-host". A label without a "B-"/"I-" prefix counts as
    outside. Forbidden: O -> I-X, B-X -> I-Y and I-X -> I-Y for X != Y, and starting with I-X.
    Returns allowed_trans (L, L) bool indexed [prev, next] and allowed_start (L,) bool.
    """
    n = len(labels)
    inside_type = [label[2:] if label.startswith("I-") else None for label in labels]
    chunk_type = [label[2:] if label.startswith(("B-", "I-")) else None for label in labels]
    allowed_trans = np.ones((n, n), dtype=bool)
    allowed_start = np.ones(n, dtype=bool)
    for nxt, entity in enumerate(inside_type):
        if entity is None:
            continue
        # I-X may only continue a chunk of the same type (common practice: IOB2 chunk rules).
        allowed_start[nxt] = False
        for prev in range(n):
            allowed_trans[prev, nxt] = chunk_type[prev] == entity
    return allowed_trans, allowed_start


def apply_mask(
    trans: np.ndarray, start: np.ndarray, allowed_trans: np.ndarray, allowed_start: np.ndarray
) -> tuple[np.ndarray, np.ndarray]:
    """Copies of trans (L, L) and start (L,) with -inf where the move is not allowed."""
    trans_m = np.where(allowed_trans, np.asarray(trans, dtype=np.float64), -np.inf)
    start_m = np.where(allowed_start, np.asarray(start, dtype=np.float64), -np.inf)
    return trans_m, start_m


# ----------------------------------------------------------------------------------------------------
# Packed layout


class _Packing:
    """Index maps between the flat token layout and the time-major packed layout.

    Packed column step_start[t] + r holds time step t of the r-th longest sequence (stable order), for
    r < batch_sizes[t]. Because lengths are sorted in decreasing order, the columns of step t are a
    prefix of those of step t-1, so step t's predecessors are columns step_start[t-1] + r.
    Packed arrays are label-major, (L, N): per-step reductions over labels then run along the long
    axis, which numpy does several times faster than along a short last axis.
    """

    def __init__(self, lengths: np.ndarray, n_tokens: int | None = None):
        lengths = _check_lengths(lengths, n_tokens)
        n_seqs = lengths.size
        total = int(lengths.sum())
        self.lengths = lengths
        self.n_tokens = total
        self.offsets = np.zeros(n_seqs, dtype=np.int64)
        if n_seqs:
            np.cumsum(lengths[:-1], out=self.offsets[1:])
        self.max_len = int(lengths.max()) if n_seqs else 0
        order = np.argsort(-lengths, kind="stable")
        rank = np.empty(n_seqs, dtype=np.int64)
        rank[order] = np.arange(n_seqs)
        counts = np.bincount(lengths, minlength=self.max_len + 1)
        self.batch_sizes = n_seqs - np.cumsum(counts)[: self.max_len]  # (T,) sequences longer than t
        self.step_start = np.zeros(self.max_len + 1, dtype=np.int64)
        np.cumsum(self.batch_sizes, out=self.step_start[1:])
        self.seq_of_token = np.repeat(np.arange(n_seqs), lengths)
        position = np.arange(total) - self.offsets[self.seq_of_token]
        self.packed_of_flat = self.step_start[position] + rank[self.seq_of_token]
        self.flat_of_packed = np.empty(total, dtype=np.int64)
        self.flat_of_packed[self.packed_of_flat] = np.arange(total)
        self.nonempty = lengths > 0
        self.first_flat = self.offsets[self.nonempty]
        self.last_flat = self.offsets[self.nonempty] + lengths[self.nonempty] - 1
        self.last_packed = self.packed_of_flat[self.last_flat]

    def cols(self, t: int, count: int | None = None) -> slice:
        """Packed columns of time step t (the first `count` of them if given)."""
        begin = int(self.step_start[t])
        return slice(begin, begin + int(self.batch_sizes[t] if count is None else count))

    def to_packed(self, flat: np.ndarray) -> np.ndarray:
        """(N, L) flat -> (L, N) packed, C-contiguous."""
        rows = flat[self.flat_of_packed]
        packed = np.empty(rows.shape[::-1])
        # Transposing in blocks of rows that fit in cache measured 2-3x faster than one big copy.
        for begin in range(0, rows.shape[0], _TRANSPOSE_BLOCK):
            packed[:, begin:begin + _TRANSPOSE_BLOCK] = rows[begin:begin + _TRANSPOSE_BLOCK].T
        return packed

    def to_flat(self, packed: np.ndarray) -> np.ndarray:
        """(L, N) packed -> (N, L) flat, C-contiguous."""
        flat = np.empty(packed.shape[::-1])
        for begin in range(0, flat.shape[0], _TRANSPOSE_BLOCK):
            flat[begin:begin + _TRANSPOSE_BLOCK] = packed[:, self.packed_of_flat[begin:begin + _TRANSPOSE_BLOCK]].T
        return flat

    def predecessor_cols(self) -> np.ndarray:
        """(N - n_0,) for each packed column of steps >= 1, in order, the column of the token before."""
        step = np.repeat(np.arange(1, self.max_len), self.batch_sizes[1:])
        return np.arange(self.n_tokens - step.size, self.n_tokens) - self.batch_sizes[step - 1]


def _check_lengths(lengths, n_tokens: int | None = None) -> np.ndarray:
    """lengths as a one-dimensional int64 array of non-negative values summing to n_tokens (if given)."""
    lengths = np.asarray(lengths)
    if lengths.ndim != 1:
        raise ValueError(f"lengths must be one-dimensional, got shape {lengths.shape}")
    lengths = lengths.astype(np.int64, copy=False)
    if lengths.size and lengths.min() < 0:
        raise ValueError("lengths must be non-negative")
    total = int(lengths.sum())
    if n_tokens is not None and n_tokens != total:
        raise ValueError(f"lengths sum to {total} but there are {n_tokens} tokens")
    return lengths


def _check_emissions(E, trans) -> np.ndarray:
    E = np.asarray(E, dtype=np.float64)
    if E.ndim != 2:
        raise ValueError(f"emissions must be (N, L), got shape {E.shape}")
    if np.shape(trans) != (E.shape[1], E.shape[1]):
        raise ValueError(f"transitions must be ({E.shape[1]}, {E.shape[1]}), got {np.shape(trans)}")
    return E


def _check_inputs(E: np.ndarray, lengths: np.ndarray, trans: np.ndarray) -> tuple[np.ndarray, _Packing]:
    E = _check_emissions(E, trans)
    return E, _Packing(lengths, E.shape[0])


# ----------------------------------------------------------------------------------------------------
# Log-sum-exp helpers


def _peak(values: np.ndarray, axis: int) -> np.ndarray:
    """Max along axis (kept), with 0 where the whole slice is -inf (so values - peak is never NaN)."""
    peak = values.max(axis=axis, keepdims=True)
    return np.where(np.isfinite(peak), peak, 0.0)


def _logsumexp(values: np.ndarray, axis: int = -1) -> np.ndarray:
    """log(sum(exp(values))) along axis; -inf (not NaN) where every entry is -inf."""
    peak = _peak(values, axis)
    with np.errstate(divide="ignore"):
        return np.log(np.exp(values - peak).sum(axis=axis)) + np.squeeze(peak, axis=axis)


class _ExpMatrix:
    """A (L, L) score matrix M (may hold -inf) prepared for log-space products over its first index.

    left = exp(M - shift).T, so left @ exp(v) sums exp(v[i] + M[i, j]) over i; shift = max finite entry.
    """

    def __init__(self, matrix: np.ndarray):
        finite = matrix[np.isfinite(matrix)]
        self.log = np.ascontiguousarray(matrix)
        self.shift = float(finite.max()) if finite.size else 0.0
        self.left = np.ascontiguousarray(np.exp(self.log - self.shift).T)


def _log_matmul_exp(values: np.ndarray, matrix: _ExpMatrix, scaled=None, peak_out=None) -> np.ndarray:
    """out[j, r] = log sum_i exp(values[i, r] + M[i, j]); (L, n) -> (L, n).

    One small matrix product per call: log(exp(M - max M).T @ exp(v - max v)) + max v + max M. Columns
    whose scaled sums fall into the sub-normal range (possible only with extreme score gaps or -inf
    inputs) are recomputed exactly, so the result is exact to rounding everywhere.
    If given, exp(v - max v) is written to `scaled` (L, n) and the column maxima to `peak_out` (n,),
    for callers that reuse them (the expected pair counts of training).
    """
    peak = _peak(values, 0)
    if scaled is None:
        scaled = np.exp(values - peak)
    else:
        np.subtract(values, peak, out=scaled)
        np.exp(scaled, out=scaled)
    if peak_out is not None:
        peak_out[:] = peak[0]
    sums = matrix.left @ scaled
    with np.errstate(divide="ignore"):
        out = np.log(sums)
    out += peak + matrix.shift
    if sums.size and sums.min() < _TINY:
        suspect = (sums < _TINY).any(axis=0)
        out[:, suspect] = _logsumexp(values[:, None, suspect] + matrix.log[:, :, None], axis=0)
    return out


class _PairFactors(NamedTuple):
    """Scaled factors of every adjacent pair, kept from the forward-backward loops; P = N - n_0 pairs,
    pair p is the token at packed column n_0 + p with its predecessor.

    alpha (L, P) = exp(log alpha[t-1] - alpha_peak), after (L, P) = exp(E[t] + log beta[t] - after_peak).
    """

    alpha: np.ndarray
    alpha_peak: np.ndarray
    after: np.ndarray
    after_peak: np.ndarray


# ----------------------------------------------------------------------------------------------------
# Forward-backward


class _PackedForwardBackward(NamedTuple):
    emissions: np.ndarray  # (L, N) packed
    log_alpha: np.ndarray  # (L, N) packed
    log_beta: np.ndarray  # (L, N) packed
    log_z: np.ndarray  # (B,)
    pairs: _PairFactors | None = None


def _forward_backward_packed(E: np.ndarray, pk: _Packing, trans, start, end,
                             keep_pairs: bool = False, Ep: np.ndarray | None = None) -> _PackedForwardBackward:
    trans = np.asarray(trans, dtype=np.float64)
    start = np.asarray(start, dtype=np.float64)
    end = np.asarray(end, dtype=np.float64)
    Ep = pk.to_packed(E) if Ep is None else Ep
    alpha = np.empty_like(Ep)
    beta = np.empty_like(Ep)
    forward, backward = _ExpMatrix(trans), _ExpMatrix(trans.T)
    first_pair = int(pk.step_start[1]) if pk.max_len > 1 else pk.n_tokens
    n_pairs = pk.n_tokens - first_pair
    pairs = None
    if keep_pairs:
        n_labels = Ep.shape[0]
        pairs = _PairFactors(np.empty((n_labels, n_pairs)), np.empty(n_pairs),
                             np.empty((n_labels, n_pairs)), np.empty(n_pairs))
    if pk.max_len:
        first = pk.cols(0)
        alpha[:, first] = start[:, None] + Ep[:, first]
    for t in range(1, pk.max_len):
        cur, prev = pk.cols(t), pk.cols(t - 1, pk.batch_sizes[t])
        pair = slice(cur.start - first_pair, cur.stop - first_pair)
        alpha[:, cur] = _log_matmul_exp(alpha[:, prev], forward, *(
            (pairs.alpha[:, pair], pairs.alpha_peak[pair]) if keep_pairs else ()))
        alpha[:, cur] += Ep[:, cur]
    beta[:, pk.last_packed] = end[:, None]
    for t in range(pk.max_len - 1, 0, -1):
        cur, prev = pk.cols(t), pk.cols(t - 1, pk.batch_sizes[t])
        pair = slice(cur.start - first_pair, cur.stop - first_pair)
        beta[:, prev] = _log_matmul_exp(Ep[:, cur] + beta[:, cur], backward, *(
            (pairs.after[:, pair], pairs.after_peak[pair]) if keep_pairs else ()))
    log_z = np.zeros(pk.lengths.size)
    log_z[pk.nonempty] = _logsumexp(alpha[:, pk.last_packed] + end[:, None], axis=0)
    return _PackedForwardBackward(Ep, alpha, beta, log_z, pairs)


def forward_backward(E, lengths, trans, start, end) -> ForwardBackward:
    """Forward-backward in log space.

    E (N, L) emissions, lengths (B,), trans (L, L) [prev, next], start (L,), end (L,) (masked: -inf at
    forbidden moves). Returns ForwardBackward(log_alpha (N, L), log_beta (N, L), log_z (B,), lengths).
    """
    E, pk = _check_inputs(E, lengths, trans)
    packed = _forward_backward_packed(E, pk, trans, start, end)
    return ForwardBackward(pk.to_flat(packed.log_alpha), pk.to_flat(packed.log_beta), packed.log_z, pk.lengths)


def _marginals_label_major(log_alpha: np.ndarray, log_beta: np.ndarray, log_z: np.ndarray) -> np.ndarray:
    """(L, n) marginals from (L, n) log alpha, log beta and per-column log Z (n,)."""
    log_z = np.where(np.isfinite(log_z), log_z, np.inf)  # exp(x - inf) = 0 instead of NaN
    marginals = log_alpha + log_beta
    marginals -= log_z
    np.exp(marginals, out=marginals)
    totals = marginals.sum(axis=0)
    # Renormalise away the rounding drift of long sequences so columns sum to 1 to the last bit or two.
    np.divide(marginals, totals, out=marginals, where=totals > 0)
    return marginals


def token_marginals(fb: ForwardBackward) -> np.ndarray:
    """P(y_t = j | x) as (N, L); each row sums to 1.

    A sequence with no path of finite score (log Z = -inf, only possible with -inf emissions) gets
    all-zero rows rather than NaN.
    """
    seq_of_token = np.repeat(np.arange(fb.lengths.size), fb.lengths)
    return _marginals_label_major(fb.log_alpha.T, fb.log_beta.T, fb.log_z[seq_of_token]).T


# ----------------------------------------------------------------------------------------------------
# Viterbi and n-best


def _max_plus(values: np.ndarray, trans: np.ndarray, out: np.ndarray, scratch: np.ndarray) -> np.ndarray:
    """out[j, r] = max_i values[i, r] + trans[i, j]; values (L, n) -> out (L, n).

    One pass per previous label over an (L, n) block that stays in cache; measured faster than a
    single (L, L, n) broadcast followed by a reduction.
    """
    np.add(trans[0][:, None], values[0][None, :], out=out)
    for prev in range(1, trans.shape[0]):
        np.add(trans[prev][:, None], values[prev][None, :], out=scratch)
        np.maximum(out, scratch, out=out)
    return out


class _MaxPlus:
    """out[j, r] = max_i values[i, r] + trans[i, j] for (L, n) blocks; exact, bit for bit.

    Shortcut for the common case of a clear leader: if the best previous label i* of column r leads
    the runner-up by more than need[i*] = max_j (max_{k != i*} trans[k, j] - trans[i*, j]) over the
    next labels j reachable from every label ("dense"), then i* wins every such j and the maxima are
    values[i*, r] + trans[i*, j]. Other columns take the full pass. Next labels with forbidden
    predecessors (I-X under BIO) are reduced over their few allowed predecessors only.
    """

    def __init__(self, trans: np.ndarray):
        n_labels = trans.shape[0]
        allowed = np.isfinite(trans)
        self.dense = np.flatnonzero(allowed.all(axis=0))
        self.trans_dense = np.ascontiguousarray(trans[:, self.dense])  # (L, D)
        ordered = np.sort(self.trans_dense, axis=0)
        top1 = ordered[-1]
        top2 = ordered[-2] if n_labels > 1 else np.full_like(top1, -np.inf)
        leader = self.trans_dense.argmax(axis=0)
        others = np.where(np.arange(n_labels)[:, None] == leader[None, :], top2[None, :], top1[None, :])
        self.need = (others - self.trans_dense).max(axis=1) if self.dense.size else np.full(n_labels, -np.inf)
        sparse_next = np.flatnonzero(~allowed.all(axis=0))
        pair_next, pair_prev = np.nonzero(allowed[:, sparse_next].T)  # sorted by next label
        self.sparse_reached = sparse_next[np.unique(pair_next)]
        self.sparse_unreached = np.setdiff1d(sparse_next, self.sparse_reached)
        self.pair_prev = pair_prev
        self.pair_trans = trans[pair_prev, sparse_next[pair_next]][:, None]
        self.group_starts = np.flatnonzero(np.r_[True, pair_next[1:] != pair_next[:-1]]) if pair_next.size else pair_next

    def __call__(self, values: np.ndarray) -> np.ndarray:
        n_labels, count = values.shape
        out = np.empty((n_labels, count))
        if self.dense.size:
            out[self.dense] = self._dense(values)
        if self.pair_prev.size:
            candidates = values[self.pair_prev]
            candidates += self.pair_trans
            out[self.sparse_reached] = np.maximum.reduceat(candidates, self.group_starts, axis=0)
        out[self.sparse_unreached] = -np.inf
        return out

    def _dense(self, values: np.ndarray) -> np.ndarray:
        count = values.shape[1]
        columns = np.arange(count)
        leader = values.argmax(axis=0)
        top = values[leader, columns]
        others = values.copy()
        others[leader, columns] = -np.inf
        with np.errstate(invalid="ignore"):  # -inf - -inf (no finite value) is NaN: not decided
            decided = (top - others.max(axis=0)) > self.need[leader]
        best = self.trans_dense[leader].T + top  # (D, n)
        undecided = np.flatnonzero(~decided)
        if undecided.size:
            size = (self.dense.size, undecided.size)
            best[:, undecided] = _max_plus(values[:, undecided], self.trans_dense, np.empty(size), np.empty(size))
        return best


def viterbi(E, lengths, trans, start, end) -> tuple[np.ndarray, np.ndarray]:
    """Best label sequence of each sequence.

    E (N, L), lengths (B,), trans (L, L), start (L,), end (L,) (masked). Returns labels (N,) int64 and
    scores (B,) (0 for an empty sequence, -inf if no path has a finite score). Ties go to the lowest
    label index, so the result is deterministic.
    """
    E = _check_emissions(E, trans)
    kernels = _compiled_kernels(E)
    if kernels is None:
        pk = _Packing(lengths, E.shape[0])
        labels, scores = _viterbi_packed(pk.to_packed(E), pk, trans, start, end)
        return labels[pk.packed_of_flat], scores
    lengths = _writable(_check_lengths(lengths, E.shape[0]))
    return kernels[1](_writable(E), lengths, *_kernel_weights(E, trans, start, end))


def _viterbi_packed(Ep: np.ndarray, pk: _Packing, trans, start, end) -> tuple[np.ndarray, np.ndarray]:
    """Viterbi on packed emissions Ep (L, N); labels (N,) in packed order, scores (B,)."""
    trans = np.asarray(trans, dtype=np.float64)
    end = np.asarray(end, dtype=np.float64)
    delta = np.empty_like(Ep)
    max_plus = _MaxPlus(trans)
    if pk.max_len:
        first = pk.cols(0)
        delta[:, first] = np.asarray(start, dtype=np.float64)[:, None] + Ep[:, first]
    for t in range(1, pk.max_len):
        cur, prev = pk.cols(t), pk.cols(t - 1, pk.batch_sizes[t])
        np.add(max_plus(delta[:, prev]), Ep[:, cur], out=delta[:, cur])
    # No back-pointers are stored: walking back, the best predecessor of the chosen label is found
    # again from delta (same sums, same rounding), which costs (L, n) per step instead of (L, L, n).
    final = delta[:, pk.last_packed] + end[:, None]
    labels = np.empty(pk.n_tokens, dtype=np.int64)
    labels[pk.last_packed] = final.argmax(axis=0)
    scores = np.zeros(pk.lengths.size)
    scores[pk.nonempty] = final.max(axis=0) if final.size else 0.0
    for t in range(pk.max_len - 2, -1, -1):
        nxt = pk.cols(t + 1)
        prev = pk.cols(t, nxt.stop - nxt.start)
        labels[prev] = (delta[:, prev] + trans[:, labels[nxt]]).argmax(axis=0)
    return labels, scores


class Decoded(NamedTuple):
    """Result of `decode`: what tagging needs from one batch, flat token layout."""

    labels: np.ndarray  # (N,) int64 Viterbi path
    scores: np.ndarray  # (B,) Viterbi path scores
    fb: ForwardBackward | ScaledForwardBackward  # for span probabilities and log Z (same attributes)
    confidence: np.ndarray  # (N,) marginal probability of each token's decoded label


def decode(E, lengths, trans, start, end) -> Decoded:
    """Viterbi path, forward-backward, and each decoded label's marginal, packing the batch once.

    Same results as `viterbi`, `forward_backward` and `token_marginals` gathered at the path, but the
    tagger's hot path packs and transposes the batch once instead of three times and computes N
    marginals instead of N x L. E (N, L), lengths (B,), trans (L, L), start (L,), end (L,) (masked).
    """
    E = _check_emissions(E, trans)
    kernels = _compiled_kernels(E)
    if kernels is None:
        return _decode_numpy(E, _Packing(lengths, E.shape[0]), trans, start, end)
    lengths = _writable(_check_lengths(lengths, E.shape[0]))
    return _decode_compiled(kernels, _writable(E), lengths, *_kernel_weights(E, trans, start, end))


def _decode_numpy(E: np.ndarray, pk: _Packing, trans, start, end) -> Decoded:
    """`decode` with numpy only: the reference for the compiled path."""
    Ep = pk.to_packed(E)
    labels, scores = _viterbi_packed(Ep, pk, trans, start, end)
    packed = _forward_backward_packed(E, pk, trans, start, end, Ep=Ep)
    columns = np.arange(pk.n_tokens)
    log_z = packed.log_z[pk.seq_of_token[pk.flat_of_packed]]
    log_z = np.where(np.isfinite(log_z), log_z, np.inf)  # no finite path: confidence 0, not NaN
    confidence = np.exp(packed.log_alpha[labels, columns] + packed.log_beta[labels, columns] - log_z)
    np.minimum(confidence, 1.0, out=confidence)  # rounding can overshoot 1 by an ulp or two
    fb = ForwardBackward(pk.to_flat(packed.log_alpha), pk.to_flat(packed.log_beta), packed.log_z, pk.lengths)
    return Decoded(labels[pk.packed_of_flat], scores, fb, confidence[pk.packed_of_flat])


def _decode_compiled(kernels, E: np.ndarray, lengths: np.ndarray, trans, start, end) -> Decoded:
    """`decode` with the compiled kernels: scaled forward-backward, exact redo of suspect sequences.

    The kernel gives each token's confidence; logs of alpha and beta are left to `ScaledForwardBackward`
    (taken only for the entries a caller asks for).
    """
    decode_flat, _, exact_forward_backward = kernels[:3]
    labels, scores, *scaled, log_z, suspect, confidence, follow_slot, follow_rows, follow_shift, alpha_of_label = \
        decode_flat(E, lengths, trans, start, end)
    # A copy of the labels: the caller may change Decoded.labels, the kernel must see those alpha_of_label holds.
    follow = (follow_slot, follow_rows, follow_shift, labels.copy(), alpha_of_label)
    redo = np.flatnonzero(suspect)
    if not redo.size:
        return Decoded(labels, scores, ScaledForwardBackward(E.shape[1], *scaled, log_z, lengths, follow=follow),
                       confidence)
    # Rare (extreme weights or impossible sequences): redo those sequences in log space, compactly.
    offsets = np.zeros(lengths.size, dtype=np.int64)
    np.cumsum(lengths[:-1], out=offsets[1:])
    redo_lengths = _writable(lengths[redo])
    redo_offsets = np.cumsum(redo_lengths) - redo_lengths
    tokens = np.repeat(offsets[redo] - redo_offsets, redo_lengths) + np.arange(int(redo_lengths.sum()))
    exact_alpha = np.empty((tokens.size, E.shape[1]))
    exact_beta = np.empty((tokens.size, E.shape[1]))
    redo_log_z = np.zeros(redo.size)
    exact_forward_backward(_writable(E[tokens]), redo_offsets, redo_lengths, np.arange(redo.size), trans, start,
                           end, exact_alpha, exact_beta, redo_log_z)
    log_z[redo] = redo_log_z
    token_log_z = np.repeat(redo_log_z, redo_lengths)
    token_log_z[~np.isfinite(token_log_z)] = np.inf  # no finite path: confidence 0, not NaN
    rows = np.arange(tokens.size)
    exact_confidence = np.exp(exact_alpha[rows, labels[tokens]] + exact_beta[rows, labels[tokens]] - token_log_z)
    confidence[tokens] = np.minimum(exact_confidence, 1.0)  # rounding can overshoot 1 by an ulp or two
    fb = ScaledForwardBackward(E.shape[1], *scaled, log_z, lengths, tokens, exact_alpha, exact_beta, follow)
    return Decoded(labels, scores, fb, confidence)


def compiled(loader: str = "load", module: str = "crf_kernels"):
    """What ``streamtag.<module>.<loader>()`` returns (compiled kernels), loaded once per process;
    None to use the numpy (or, for the scanner, regex) code: USE_KERNELS is off, or numba is missing
    or broken.

    Loaded on first use (importing numba and loading cached machine code takes a fraction of a
    second, which commands that never decode should not pay). Every kernel module (`crf_kernels`,
    `feature_kernels`, `scan_kernels`) is loaded here, so there is one way kernels are loaded and
    one switch for all of them.
    """
    if not USE_KERNELS:
        return None
    key = (module, loader)
    found = _loaded.get(key)
    if found is None:
        with _kernels_lock:
            found = _loaded.get(key)
            if found is None:
                try:
                    kernels = importlib.import_module(f"streamtag.{module}")
                except (ImportError, OSError):  # numba missing, or its compiler library fails to load
                    found = False
                else:
                    found = getattr(kernels, loader)()
                _loaded[key] = found
    return found or None


def _compiled_kernels(E: np.ndarray):
    """The decode and Viterbi kernels (see `crf_kernels.load`), or None (see `compiled`; also None
    when there are no labels)."""
    global _kernels
    if E.shape[1] == 0:
        return None
    kernels = compiled("load")
    if _kernels is None and USE_KERNELS:
        _kernels = kernels or False
    return kernels


def _kernel_weights(E: np.ndarray, trans, start, end) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """trans, start, end as C-contiguous writable float64 of checked shapes.

    The kernels do not check bounds, and numba compiles a separate version for read-only or
    non-contiguous arrays; both are avoided here. E must already be (N, L) float64.
    """
    n_labels = E.shape[1]
    arrays = []
    for name, value, shape in (("transitions", trans, (n_labels, n_labels)), ("start", start, (n_labels,)),
                               ("end", end, (n_labels,))):
        array = np.ascontiguousarray(value, dtype=np.float64)
        if array.shape != shape:
            raise ValueError(f"{name} must be {shape}, got {array.shape}")
        arrays.append(_writable(array))
    return arrays[0], arrays[1], arrays[2]


def _writable(array: np.ndarray) -> np.ndarray:
    """A C-contiguous, writable version of array (a copy only if needed), for the kernels' one signature."""
    array = np.ascontiguousarray(array)
    return array if array.flags.writeable else array.copy()


def _top_k(candidates: np.ndarray, k: int) -> tuple[np.ndarray, np.ndarray]:
    """k largest entries along the last axis, best first; ties go to the lowest index.

    candidates (..., M) is overwritten. Returns values (..., k) and indices (..., k). Repeated argmax
    (k passes) is cheaper than a sort for the small k used here and gives a deterministic order.
    """
    values = np.empty(candidates.shape[:-1] + (k,))
    indices = np.empty(candidates.shape[:-1] + (k,), dtype=np.intp)
    for rank in range(k):
        best = candidates.argmax(axis=-1)[..., None]
        values[..., rank] = np.take_along_axis(candidates, best, axis=-1)[..., 0]
        indices[..., rank] = best[..., 0]
        np.put_along_axis(candidates, best, -np.inf, axis=-1)
    return values, indices


def nbest(E, lengths, trans, start, end, k: int) -> tuple[np.ndarray, np.ndarray]:
    """The k best label sequences of each sequence (list Viterbi, exact).

    E (N, L), lengths (B,), trans (L, L), start (L,), end (L,) (masked), k >= 1.
    Returns labels (k, N) int64, row m holding the (m+1)-th best path (-1 on the tokens of a sequence
    with fewer than m+1 paths of finite score), and scores (B, k) best first (-inf where no such path).
    An empty sequence has one path (score 0). Ties are broken by label index, deterministically.
    """
    if int(k) < 1:
        raise ValueError(f"k must be at least 1, got {k}")
    k = int(k)
    E = _check_emissions(E, trans)
    kernels = _compiled_kernels(E)
    if kernels is not None:
        weights = _kernel_weights(E, trans, start, end)
        # The kernel's tie rule assumes no NaN or +inf (numpy's argmax ranks NaN first); such input
        # takes the numpy code.
        if not any(np.isnan(a).any() or np.isposinf(a).any() for a in (E, *weights)):
            lengths = _writable(_check_lengths(lengths, E.shape[0]))
            return kernels[3](_writable(E), lengths, *weights, k)
    return _nbest_numpy(E, _Packing(lengths, E.shape[0]), trans, start, end, k)


def _nbest_numpy(E: np.ndarray, pk: _Packing, trans, start, end, k: int) -> tuple[np.ndarray, np.ndarray]:
    """`nbest` with numpy only: the reference for the compiled path."""
    n_labels = E.shape[1]
    trans = np.asarray(trans, dtype=np.float64)
    # trans_k[next, prev * k + r] = trans[prev, next]: one column per (previous label, rank) state.
    trans_k = np.repeat(trans.T, k, axis=1)
    Ep = E[pk.flat_of_packed]
    delta = np.full(Ep.shape + (k,), -np.inf)
    back = np.zeros(Ep.shape + (k,), dtype=np.intp)
    if pk.max_len:
        first = pk.cols(0)
        delta[first, :, 0] = np.asarray(start, dtype=np.float64) + Ep[first]
    for t in range(1, pk.max_len):
        cur = pk.cols(t)
        prev = pk.cols(t - 1, pk.batch_sizes[t])
        count = cur.stop - cur.start
        candidates = delta[prev].reshape(count, 1, n_labels * k) + trans_k[None]  # (n, next, prev*k)
        values, back[cur] = _top_k(candidates, k)
        delta[cur] = values + Ep[cur][:, :, None]
    final = delta[pk.last_packed].reshape(-1, n_labels * k) + np.repeat(np.asarray(end, np.float64), k)
    final_scores, final_states = _top_k(final, k)
    scores = np.full((pk.lengths.size, k), -np.inf)
    scores[:, 0] = 0.0
    scores[pk.nonempty] = final_scores
    # state = label * k + rank of the partial path at that label; walk back through the pointers.
    states = np.empty((pk.n_tokens, k), dtype=np.intp)
    states[pk.last_packed] = final_states
    for t in range(pk.max_len - 2, -1, -1):
        nxt = pk.cols(t + 1)
        count = nxt.stop - nxt.start
        pointers = back[nxt].reshape(count, n_labels * k)
        states[pk.cols(t, count)] = pointers[np.arange(count)[:, None], states[nxt]]
    labels = (states[pk.packed_of_flat] // k).T.astype(np.int64)
    labels[~np.isfinite(scores[pk.seq_of_token]).T] = -1
    return labels, scores


# ----------------------------------------------------------------------------------------------------
# Span probability


def span_log_prob(fb: ForwardBackward | ScaledForwardBackward, E, lengths, trans, end, seq, first, stop, b_label,
                  i_label) -> np.ndarray:
    """log P(tokens first..stop-1 of sequence seq form exactly one chunk), vectorised over S spans.

    The event: y_first = B-X, y_first+1 .. y_stop-1 = I-X, and y_stop != I-X (or stop is the end of the
    sequence). fb from `forward_backward` (or `decode`'s fb) on the same E (N, L), lengths (B,), masked
    trans (L, L) and end (L,); only the rows it needs are asked of it. seq, first, stop: (S,) ints with
    0 <= first < stop <= lengths[seq]; b_label, i_label: label indices of B-X and I-X, scalars or (S,).
    Returns (S,) log probabilities (-inf for impossible spans). Equals forward-backward with those
    tokens clamped: alpha at first, the chain of I-X scores, then the sum over the label after the
    span (or end), minus log Z.
    """
    E = np.asarray(E, dtype=np.float64)
    trans = np.asarray(trans, dtype=np.float64)
    end = np.asarray(end, dtype=np.float64)
    lengths = np.asarray(lengths, dtype=np.int64)
    seq, first, stop = (np.atleast_1d(np.asarray(a, dtype=np.int64)) for a in (seq, first, stop))
    seq, first, stop = np.broadcast_arrays(seq, first, stop)
    b_label = np.broadcast_to(np.asarray(b_label, dtype=np.int64), seq.shape)
    i_label = np.broadcast_to(np.asarray(i_label, dtype=np.int64), seq.shape)
    n_spans = seq.size
    if n_spans == 0:
        return np.zeros(0)
    if seq.min() < 0 or seq.max() >= lengths.size:
        raise ValueError("span sequence index out of range")
    if (first < 0).any() or (stop <= first).any() or (stop > lengths[seq]).any():
        raise ValueError("spans must satisfy 0 <= first < stop <= sequence length")
    offsets = np.concatenate(([0], np.cumsum(lengths)[:-1])) if lengths.size else lengths
    if isinstance(fb, ScaledForwardBackward) and E.shape[1]:
        kernels = compiled("load")  # decode's kernels made fb, so they are loaded
        if kernels is not None:
            return _span_log_prob_compiled(kernels[4], fb, E, offsets, lengths, trans, end, seq, first, stop,
                                           b_label, i_label)
    first_token = offsets[seq] + first
    log_prob = fb.log_alpha_at(first_token, b_label)

    # Tokens inside the span after the first: emissions of I-X plus the B->I and I->I moves.
    n_inside = stop - first - 1
    span_of_inside = np.repeat(np.arange(n_spans), n_inside)
    inside_start = np.cumsum(n_inside) - n_inside
    inside_token = first_token[span_of_inside] + 1 + np.arange(span_of_inside.size) - inside_start[span_of_inside]
    inside_emission = np.bincount(
        span_of_inside, weights=E[inside_token, i_label[span_of_inside]], minlength=n_spans
    )
    has_inside = n_inside > 0
    log_prob[has_inside] += trans[b_label, i_label][has_inside] + inside_emission[has_inside]
    repeated = n_inside > 1
    log_prob[repeated] += (n_inside[repeated] - 1) * trans[i_label, i_label][repeated]

    # After the span: the sequence ends, or the next label is anything but I-X.
    last_label = np.where(has_inside, i_label, b_label)
    at_end = stop == lengths[seq]
    log_prob[at_end] += end[last_label[at_end]]
    inner = ~at_end
    if inner.any():
        next_token = offsets[seq[inner]] + stop[inner]
        following = trans[last_label[inner]] + E[next_token] + fb.log_beta_rows(next_token)
        following[np.arange(following.shape[0]), i_label[inner]] = -np.inf
        log_prob[inner] += _logsumexp(following)
    log_z = fb.log_z[seq]
    return np.where(np.isfinite(log_z), log_prob - np.where(np.isfinite(log_z), log_z, 0.0), -np.inf)


def _span_log_prob_compiled(kernel, fb: ScaledForwardBackward, E, offsets, lengths, trans, end, seq, first, stop,
                            b_label, i_label) -> np.ndarray:
    """`span_log_prob` by the compiled kernel, reading fb's scaled buffers directly (checked inputs)."""
    if E.shape != (fb.row_base.size, fb.n_labels) or trans.shape != (fb.n_labels, fb.n_labels) \
            or end.shape != (fb.n_labels,) or lengths.shape != fb.log_z.shape:
        raise ValueError("span_log_prob: E, lengths, trans and end must be those fb was computed from")
    if ((b_label < 0) | (b_label >= fb.n_labels) | (i_label < 0) | (i_label >= fb.n_labels)).any():
        raise ValueError("span label index out of range")
    arrays = [_writable(np.ascontiguousarray(a, dtype=np.int64))
              for a in (offsets, lengths, seq, first, stop, b_label, i_label)]
    return kernel(fb.alpha, fb.beta, fb.row_base, fb.row_stride, fb.alpha_shift, fb.beta_shift,
                  _writable(np.ascontiguousarray(fb.exact_tokens, dtype=np.int64)), _writable(fb.exact_alpha),
                  _writable(fb.exact_beta), *fb.follow, fb.log_z,
                  _writable(E), *arrays[:2], _writable(trans), _writable(end), *arrays[2:])


# ----------------------------------------------------------------------------------------------------
# Training objective


def _sum_of_outer_products(left: np.ndarray, right: np.ndarray) -> np.ndarray:
    """sum_p left[:, p] (x) right[:, p] = left @ right.T for (L, P) inputs, as (L, L).

    Done as a batch of products over fixed blocks of _PAIR_BLOCK columns, summed in order: one
    product with a long inner dimension is split across BLAS threads, which changes the summation
    order with the thread count; small blocks run on one thread, so the bits do not depend on it.
    """
    n_labels, n_pairs = left.shape
    whole = n_pairs - n_pairs % _PAIR_BLOCK
    total = left[:, whole:] @ right[:, whole:].T
    if whole:
        blocks = whole // _PAIR_BLOCK
        left_blocks = left[:, :whole].reshape(n_labels, blocks, _PAIR_BLOCK).transpose(1, 0, 2)
        right_blocks = right[:, :whole].reshape(n_labels, blocks, _PAIR_BLOCK).transpose(1, 2, 0)
        total += np.matmul(left_blocks, right_blocks).sum(axis=0)
    return total


def _expected_pair_counts(packed: _PackedForwardBackward, pk: _Packing, trans: np.ndarray, weight: np.ndarray) -> np.ndarray:
    """sum over adjacent pairs of weight * P(y_t-1 = i, y_t = j | x) as (L, L); weight (N,) packed.

    P(i, j) = exp(alpha[t-1, i] + trans[i, j] + E[t, j] + beta[t, j] - log Z). Factored as
    exp(alpha - a) (x) exp(E + beta - g) * exp(trans - shift) * exp(a + g + shift - log Z) with column
    maxima a, g (the first two factors are kept from the forward-backward loops), so all pairs reduce
    to one (L, P) @ (P, L) product. The last factor is at least 1 / L^2; a pair whose factor would
    overflow (extreme score gaps) is summed exactly instead.
    """
    if pk.max_len < 2:
        return np.zeros_like(trans)
    nxt = slice(int(pk.step_start[1]), pk.n_tokens)
    factors = packed.pairs
    log_z = packed.log_z[pk.seq_of_token[pk.flat_of_packed[nxt]]]
    pair_weight = weight[nxt]
    matrix = _ExpMatrix(trans)
    exponent = factors.alpha_peak + factors.after_peak + matrix.shift - log_z
    exact = ~(exponent <= _EXP_LIMIT)  # also catches NaN from an impossible sequence (log Z = -inf)
    scale = pair_weight * np.exp(np.where(exact, 0.0, exponent))
    scale[exact] = 0.0
    counts = _sum_of_outer_products(factors.alpha * scale, factors.after) * matrix.left.T
    cols = np.flatnonzero(exact & np.isfinite(log_z))
    if cols.size:
        pair_alpha = packed.log_alpha[:, pk.predecessor_cols()[cols]]
        pair_after = packed.emissions[:, nxt][:, cols] + packed.log_beta[:, nxt][:, cols]
        log_pairs = pair_alpha[:, None, :] + trans[:, :, None] + pair_after[None, :, :] - log_z[cols]
        counts += np.exp(log_pairs) @ pair_weight[cols]
    return counts


def nll_and_grad(E, gold, lengths, trans, start, end, weights=None):
    """Weighted negative log-likelihood of the gold labels and its gradients.

    E (N, L) emissions, gold (N,) label indices, lengths (B,), trans (L, L), start (L,), end (L,) masked
    (-inf at forbidden moves), weights (B,) or None for all ones.
    Returns (nll, dE (N, L), dtrans (L, L), dstart (L,), dend (L,)) where
    nll = sum_b w_b (log Z_b - score_b(gold)), dE = w * (marginals - onehot(gold)),
    dtrans = weighted expected pair counts - weighted gold pair counts, and likewise for start and end.
    Gradients at forbidden (-inf) entries are exactly 0. Raises ValueError if the gold labels take a
    forbidden move (their probability is 0).
    """
    E, pk = _check_inputs(E, lengths, trans)
    n_tokens, n_labels = E.shape
    trans = np.asarray(trans, dtype=np.float64)
    start = np.asarray(start, dtype=np.float64)
    end = np.asarray(end, dtype=np.float64)
    gold = np.asarray(gold, dtype=np.int64)
    if gold.shape != (n_tokens,):
        raise ValueError(f"gold must be ({n_tokens},), got {gold.shape}")
    if n_tokens and (gold.min() < 0 or gold.max() >= n_labels):
        raise ValueError("gold label index out of range")
    seq_weight = np.ones(pk.lengths.size) if weights is None else np.asarray(weights, dtype=np.float64)
    if seq_weight.shape != pk.lengths.shape:
        raise ValueError(f"weights must be ({pk.lengths.size},), got {seq_weight.shape}")

    is_prev = np.ones(n_tokens, dtype=bool)
    is_prev[pk.last_flat] = False
    prev = np.flatnonzero(is_prev)
    gold_first, gold_last = gold[pk.first_flat], gold[pk.last_flat]
    gold_score = np.zeros(pk.lengths.size)  # bincount of nothing would be int64
    gold_score += np.bincount(pk.seq_of_token, weights=E[np.arange(n_tokens), gold], minlength=pk.lengths.size)
    gold_score += np.bincount(
        pk.seq_of_token[prev], weights=trans[gold[prev], gold[prev + 1]], minlength=pk.lengths.size
    )
    gold_score[pk.nonempty] += start[gold_first] + end[gold_last]
    if not np.isfinite(gold_score).all():
        raise ValueError("a gold label sequence takes a forbidden move or has a -inf score")

    packed = _forward_backward_packed(E, pk, trans, start, end, keep_pairs=True)
    nll = float(np.dot(seq_weight, packed.log_z - gold_score))
    seq_of_packed = pk.seq_of_token[pk.flat_of_packed]
    weight_packed = seq_weight[seq_of_packed]
    marginals = _marginals_label_major(packed.log_alpha, packed.log_beta, packed.log_z[seq_of_packed])
    d_trans = _expected_pair_counts(packed, pk, trans, weight_packed)
    seq_w = seq_weight[pk.nonempty]
    d_start = marginals[:, pk.packed_of_flat[pk.first_flat]] @ seq_w
    d_end = marginals[:, pk.last_packed] @ seq_w
    marginals *= weight_packed
    d_emission = pk.to_flat(marginals)
    token_weight = seq_weight[pk.seq_of_token]
    d_emission[np.arange(n_tokens), gold] -= token_weight
    d_start -= np.bincount(gold_first, weights=seq_w, minlength=n_labels)
    d_end -= np.bincount(gold_last, weights=seq_w, minlength=n_labels)
    d_trans -= np.bincount(
        gold[prev] * n_labels + gold[prev + 1], weights=token_weight[prev], minlength=n_labels * n_labels
    ).reshape(n_labels, n_labels)
    # Forbidden entries get exactly zero (the expected counts there are already 0, gold counts too).
    d_trans[~np.isfinite(trans)] = 0.0
    d_start[~np.isfinite(start)] = 0.0
    d_end[~np.isfinite(end)] = 0.0
    return nll, d_emission, d_trans, d_start, d_end
