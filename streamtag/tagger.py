"""Batch of lines in, tagged lines out: tokenize -> features -> CRF decode -> spans with confidence.

No files here: the daemon, ``tag`` and ``replay`` read lines, hand a batch to ``Tagger.tag`` and
write what comes back. Every numeric step works on the whole batch at once.

Confidence rules (documented in the README):
- token confidence: the marginal probability of the decoded label at that token;
- span confidence: the exact probability that exactly that span with that label is in the
  labelling (constrained forward-backward, ``crf.span_log_prob``), not a product of marginals;
- line confidence: the lowest of its token and span confidences; a line with no tokens has 1.0.
"""

from __future__ import annotations

from dataclasses import dataclass, field
import numpy as np

from streamtag import crf
from streamtag.features import EmissionScorer, FeatureExtractor, FeatureSpec
from streamtag.model import Model
from streamtag.spans import spans_from_label_ids
from streamtag.tokenize import BatchTokenizer, TokenBatch

DEFAULT_MAX_TOKENS = 256
DEFAULT_WINDOW_OVERLAP = 32
# Token types whose summed weights are kept (x window slots x labels x 8 bytes: about 38 MB at 5 slots
# and 19 labels). A live log shows a few new types per line, so this spans tens of thousands of lines.
SCORE_CACHE_TYPES = 50_000


@dataclass(slots=True)
class TaggedSpan:
    start: int  # character offset into the line, inclusive
    end: int  # character offset, exclusive
    label: str  # entity type, e.g. "host"
    text: str
    confidence: float | None  # None for runner-up spans (only the path probability is known)


@dataclass(slots=True)
class TaggedLine:
    text: str
    spans: list[TaggedSpan]
    confidence: float
    n_tokens: int
    flags: list[str] = field(default_factory=list)
    weakest: str = ""  # what set the line confidence, for the review reason
    runner_up: list[TaggedSpan] | None = None
    runner_up_probability: float | None = None


@dataclass(slots=True)
class TaggedBatch:
    """A tagged batch of B lines as arrays (S spans in all, ordered by line, then by position).

    `tagged_lines` makes the objects; the record writer (`records.encode_tagged_batch`) reads the
    arrays directly, which saves making a TaggedLine per line and a TaggedSpan per span.
    """

    lines: list[str]  # (B,) the texts tagged
    span_line: np.ndarray  # (S,) int64 line index of each span
    span_start: np.ndarray  # (S,) int64 character offset into its line, inclusive
    span_end: np.ndarray  # (S,) int64 character offset, exclusive
    span_type: np.ndarray  # (S,) int64 index into type_names
    span_confidence: np.ndarray  # (S,) float64
    confidence: np.ndarray  # (B,) float64 line confidence
    n_tokens: np.ndarray  # (B,) int64
    split: np.ndarray | None  # (B,) bool, lines decoded in windows; None: no line was
    type_names: np.ndarray  # (types,) object, entity type names
    # Objects of the lines below the review threshold, with reason and runner-up, by line index.
    described: dict[int, TaggedLine] = field(default_factory=dict)

    @classmethod
    def empty(cls, type_names: np.ndarray) -> TaggedBatch:
        none = np.zeros(0, dtype=np.int64)
        return cls([], none, none, none, none, np.zeros(0), np.zeros(0), none, None, type_names)

    def span_bounds(self) -> np.ndarray:
        """(B + 1,) line b's spans are [bounds[b], bounds[b + 1])."""
        return np.searchsorted(self.span_line, np.arange(len(self.lines) + 1))

    def tagged_lines(self) -> list[TaggedLine]:
        """One TaggedLine per line (the described ones as they are)."""
        char_start = self.span_start.tolist()
        char_end = self.span_end.tolist()
        # Every step is a C-level map over the batch's spans or lines (a Python loop per span cost
        # ~1.5 us a span).
        span_texts = list(map(str.__getitem__, map(self.lines.__getitem__, self.span_line.tolist()),
                              map(slice, char_start, char_end)))
        spans = list(map(TaggedSpan, char_start, char_end, self.type_names.take(self.span_type).tolist(),
                         span_texts, self.span_confidence.tolist()))
        bounds = self.span_bounds().tolist()
        results = list(map(TaggedLine, self.lines, map(spans.__getitem__, map(slice, bounds[:-1], bounds[1:])),
                           self.confidence.tolist(), self.n_tokens.tolist()))
        if self.split is not None:
            for line_index in np.flatnonzero(self.split).tolist():
                results[line_index].flags.append("split")
        for line_index, described in self.described.items():
            results[line_index] = described
        return results

    def line(self, index: int) -> TaggedLine:
        """The TaggedLine of one line (its described object if it has one)."""
        if index in self.described:
            return self.described[index]
        first, stop = np.searchsorted(self.span_line, [index, index + 1]).tolist()
        text = self.lines[index]
        spans = [TaggedSpan(start, end, self.type_names[type_index], text[start:end], confidence)
                 for start, end, type_index, confidence in zip(
                     self.span_start[first:stop].tolist(), self.span_end[first:stop].tolist(),
                     self.span_type[first:stop].tolist(), self.span_confidence[first:stop].tolist())]
        flags = ["split"] if self.split is not None and self.split[index] else []
        return TaggedLine(text, spans, float(self.confidence[index]), int(self.n_tokens[index]), flags)


@dataclass(slots=True)
class _Batch:
    """Token sequences cut from the lines: one per line, or several windows for a long line.

    ``seq_line`` (S,) maps each sequence to its line; ``seq_first_token`` (S,) is the index, within
    its line, of the sequence's first token; ``owned_from``/``owned_to`` (S,) is the token range,
    within the line, whose labels this sequence decides (windows overlap; each token has one owner).
    ``token_index`` (sum of lengths,) is, per sequence token, its index among the batch's line
    tokens, or None when every line is one sequence (the common case: no copy, no masks).
    """

    seq_line: np.ndarray
    seq_first_token: np.ndarray
    owned_from: np.ndarray
    owned_to: np.ndarray
    lengths: np.ndarray
    token_index: np.ndarray | None


class Tagger:
    """Tags batches of lines with one model. Cheap to call repeatedly; caches per piece and per type."""

    def __init__(
        self,
        model: Model,
        max_tokens: int = DEFAULT_MAX_TOKENS,
        window_overlap: int = DEFAULT_WINDOW_OVERLAP,
    ) -> None:
        if max_tokens < 2:
            raise ValueError("max_tokens must be at least 2")
        self.model = model
        self.max_tokens = max_tokens
        self.window_overlap = min(window_overlap, max_tokens // 2)
        self.extractor = FeatureExtractor(FeatureSpec.from_dict(model.feature_spec), model.vocabulary)
        allowed_trans, allowed_start = crf.bio_allowed(model.labels)
        self.trans, self.start = crf.apply_mask(model.transitions, model.start, allowed_trans, allowed_start)
        self.end = np.asarray(model.end, dtype=np.float64)
        self.emission = np.ascontiguousarray(model.emission, dtype=np.float64)
        self.tokenizer = BatchTokenizer()
        self.scorer = EmissionScorer(self.extractor, self.emission, cache_size=SCORE_CACHE_TYPES)
        self.entity_types = [label[2:] for label in model.labels if label.startswith("B-")]
        self._type_names = np.array(self.entity_types, dtype=object)  # (types,) for gathers by type index
        self.b_index = np.array([model.labels.index("B-" + t) for t in self.entity_types], dtype=np.int64)
        self.i_index = np.array([model.labels.index("I-" + t) for t in self.entity_types], dtype=np.int64)

    @property
    def model_id(self) -> str:
        return self.model.model_id

    def tag(self, lines: list[str], review_below: float | None = None) -> list[TaggedLine]:
        """Tag a batch of lines. Lines whose confidence is below ``review_below`` get a runner-up."""
        return self.tag_batch(lines, review_below).tagged_lines()

    def tag_batch(self, lines: list[str], review_below: float | None = None) -> TaggedBatch:
        """`tag`, with the results left as arrays (objects only for the lines below ``review_below``,
        which get the reason and runner-up a reviewer sees)."""
        if not lines:
            return TaggedBatch.empty(self._type_names)
        tokens = self.tokenizer.tokenize_lines(lines, lazy=True)  # token strs made only when read
        type_rows = self.scorer.type_rows(tokens.texts, tokens.kinds, tokens.keys, tokens.generation)
        batch = self._cut(tokens.counts)
        if batch.token_index is not None:
            type_rows = type_rows[batch.token_index]
        emissions = self.scorer.emissions(type_rows, batch.lengths)
        decoded = crf.decode(emissions, batch.lengths, self.trans, self.start, self.end)
        tagged = self._assemble(lines, tokens, batch, decoded, emissions)
        if review_below is not None:
            doubtful = np.flatnonzero(tagged.confidence < review_below)  # (D,) lines, usually a few in a hundred
            if doubtful.size:
                tagged.described = {int(i): tagged.line(int(i)) for i in doubtful}
                self._describe_weakest(tagged.described, tokens, batch, decoded, doubtful)
                self._add_runner_up(tagged.described, tokens, batch, emissions, decoded.fb, doubtful)
        return tagged

    # -- cutting lines into sequences -------------------------------------------------------------

    def _cut(self, counts: np.ndarray) -> _Batch:
        """Sequences for lines of ``counts`` (B,) tokens: the lines themselves unless one is too long."""
        n_lines = counts.size
        if n_lines == 0 or counts.max() <= self.max_tokens:
            zeros = np.zeros(n_lines, dtype=np.int64)
            return _Batch(np.arange(n_lines), zeros, zeros, counts, counts, None)
        seq_line, first, owned_from, owned_to, lengths = [], [], [], [], []
        for line_index, n in enumerate(counts.tolist()):   # per line, only in a batch with a long line
            for start, length, own_from, own_to in self._windows(n):
                seq_line.append(line_index)
                first.append(start)
                lengths.append(length)
                owned_from.append(own_from)
                owned_to.append(own_to)
        as_int = lambda values: np.asarray(values, dtype=np.int64)  # noqa: E731
        seq_line, first, lengths = as_int(seq_line), as_int(first), as_int(lengths)
        line_offsets = np.cumsum(counts) - counts
        seq_offsets = np.cumsum(lengths) - lengths
        token_index = (np.arange(lengths.sum()) - np.repeat(seq_offsets, lengths)
                       + np.repeat(line_offsets[seq_line] + first, lengths))
        return _Batch(seq_line, first, as_int(owned_from), as_int(owned_to), lengths, token_index)

    def _windows(self, n_tokens: int) -> list[tuple[int, int, int, int]]:
        """(first token, length, owned from, owned to) per window; one window when the line fits.

        Windows overlap by ``window_overlap`` tokens; each token is owned by the window in which it
        lies farthest from an edge, so every label is decided with context on both sides.
        """
        if n_tokens <= self.max_tokens:
            return [(0, n_tokens, 0, n_tokens)]
        step = self.max_tokens - self.window_overlap
        starts = list(range(0, n_tokens - self.max_tokens, step)) + [n_tokens - self.max_tokens]
        windows = []
        for k, start in enumerate(starts):
            own_from = 0 if k == 0 else (start + starts[k - 1] + self.max_tokens) // 2
            own_to = n_tokens if k == len(starts) - 1 else (starts[k + 1] + start + self.max_tokens) // 2
            windows.append((start, self.max_tokens, own_from, own_to))
        return windows

    # -- from label paths to spans ----------------------------------------------------------------

    def _owned(self, batch: _Batch, values: np.ndarray) -> np.ndarray:
        """Per sequence token values (N_seq,) -> per line token values (N,), from each token's owner."""
        if batch.token_index is None:
            return values
        return values[self._owned_mask(batch)]

    @staticmethod
    def _owned_mask(batch: _Batch) -> np.ndarray:
        seq_offsets = np.cumsum(batch.lengths) - batch.lengths
        seq_of_token = np.repeat(np.arange(batch.lengths.size), batch.lengths)
        pos_in_line = np.arange(batch.lengths.sum()) - seq_offsets[seq_of_token] + batch.seq_first_token[seq_of_token]
        return (pos_in_line >= batch.owned_from[seq_of_token]) & (pos_in_line < batch.owned_to[seq_of_token])

    def _assemble(self, lines, tokens: TokenBatch, batch: _Batch, decoded: crf.Decoded, emissions) -> TaggedBatch:
        """Label paths of the sequences -> spans and confidences per line, vectorised over the batch.

        Windows of a split line overlap; each token's label comes from the window that owns it, so
        the owned tokens, in order, are exactly the lines' tokens. Chunks are read off that merged
        path (an I-X that does not continue a chunk at a window seam starts one, as in CoNLL rules).
        """
        line_labels = self._owned(batch, decoded.labels)
        line_conf = self._owned(batch, decoded.confidence)
        line_lengths = tokens.counts
        line_offsets = np.cumsum(line_lengths) - line_lengths

        span_line, span_first, span_stop, span_type = spans_from_label_ids(line_labels, line_lengths,
                                                                           self.model.labels)
        span_conf = self._span_confidence(batch, decoded.fb, emissions, line_conf, line_offsets,
                                          span_line, span_first, span_stop, span_type)
        line_min = np.ones(len(lines))
        nonempty = line_lengths > 0
        if nonempty.any():
            line_min[nonempty] = np.minimum.reduceat(line_conf, line_offsets[nonempty])
        if span_line.size:  # spans come ordered by line: one reduceat per run of a line's spans
            # (np.minimum.at, the obvious call, cost about 1.3 us a line)
            firsts = np.flatnonzero(np.concatenate(([True], span_line[1:] != span_line[:-1])))
            with_spans = span_line[firsts]
            line_min[with_spans] = np.minimum(line_min[with_spans], np.minimum.reduceat(span_conf, firsts))

        span_token = line_offsets[span_line] + span_first
        split = None
        if batch.token_index is not None:
            split = np.bincount(batch.seq_line, minlength=len(lines)) > 1
        return TaggedBatch(lines, span_line, tokens.starts[span_token],
                           tokens.ends[span_token + (span_stop - span_first) - 1], span_type, span_conf, line_min,
                           line_lengths, split, self._type_names)

    def _span_confidence(self, batch, fb, emissions, line_conf, line_offsets,
                         span_line, span_first, span_stop, span_type) -> np.ndarray:
        """Exact probability of each span (constrained forward-backward) in the window owning it.

        A span that runs past the end of its owning window (only at a seam of a split line) has no
        exact probability in one window; it gets the lowest marginal of its tokens instead.
        """
        if span_line.size == 0:
            return np.zeros(0)
        if batch.token_index is None:   # one sequence per line: the span's sequence is its line
            return np.exp(crf.span_log_prob(fb, emissions, batch.lengths, self.trans, self.end, span_line,
                                            span_first, span_stop, self.b_index[span_type],
                                            self.i_index[span_type]))
        owner = self._owned(batch, np.repeat(np.arange(batch.lengths.size), batch.lengths))
        seq = owner[line_offsets[span_line] + span_first]
        local_first = span_first - batch.seq_first_token[seq]
        local_stop = span_stop - batch.seq_first_token[seq]
        fits = local_stop <= batch.lengths[seq]
        conf = np.empty(span_line.size)
        conf[fits] = np.exp(crf.span_log_prob(
            fb, emissions, batch.lengths, self.trans, self.end, seq[fits], local_first[fits], local_stop[fits],
            self.b_index[span_type[fits]], self.i_index[span_type[fits]]))
        for s in np.flatnonzero(~fits).tolist():  # rare: only spans crossing a window seam
            first = line_offsets[span_line[s]] + span_first[s]
            conf[s] = line_conf[first : line_offsets[span_line[s]] + span_stop[s]].min()
        return conf

    def _describe_weakest(self, results: dict[int, TaggedLine], tokens: TokenBatch, batch: _Batch,
                          decoded: crf.Decoded, doubtful: np.ndarray) -> None:
        """Name what set the confidence of each doubtful line (``doubtful`` (D,) line indices, those
        going to review; ``results`` their objects by line index): its weakest span, else its weakest token (found on the line's owned tokens:
        the windows' overlap never decides a label)."""
        line_labels = self._owned(batch, decoded.labels)
        line_conf = self._owned(batch, decoded.confidence)
        line_offsets = np.cumsum(tokens.counts) - tokens.counts
        for line_index in doubtful.tolist():
            result = results[line_index]
            if result.n_tokens == 0:
                continue
            weakest_span = min(result.spans, key=lambda span: span.confidence, default=None)
            if weakest_span is not None and weakest_span.confidence <= result.confidence:
                result.weakest = (f"span {weakest_span.text!r} as {weakest_span.label} "
                                  f"at {weakest_span.confidence:.3f}")
                continue
            first = int(line_offsets[line_index])
            token = first + int(np.argmin(line_conf[first : first + result.n_tokens]))
            label = self.model.labels[int(line_labels[token])]
            result.weakest = f"token {tokens.texts[token]!r} as {label} at {result.confidence:.3f}"

    # -- runner-up labelling for doubtful lines -----------------------------------------------------

    def _add_runner_up(self, results: dict[int, TaggedLine], tokens: TokenBatch, batch: _Batch, emissions, fb,
                       doubtful: np.ndarray) -> None:
        """Second-best path for the doubtful lines (``doubtful`` (D,) line indices, ``results`` their
        objects by line index; only those: n-best costs k times Viterbi).

        Split lines get none: the second-best path of one window is not a labelling of the line.
        """
        if batch.token_index is None:  # one sequence per line: a line's index is its sequence's
            seqs = doubtful
        else:
            n_lines = tokens.counts.size
            single = np.bincount(batch.seq_line, minlength=n_lines) == 1
            is_doubtful = np.zeros(n_lines, dtype=bool)
            is_doubtful[doubtful] = True
            seqs = np.flatnonzero((is_doubtful & single)[batch.seq_line])
        if not seqs.size:
            return
        sub_lengths = batch.lengths[seqs]
        seq_offsets = np.cumsum(batch.lengths) - batch.lengths
        sub_offsets = np.cumsum(sub_lengths) - sub_lengths
        # (sum of sub_lengths,) flat rows of the chosen sequences' tokens, in order
        sub_tokens = np.arange(int(sub_lengths.sum())) + np.repeat(seq_offsets[seqs] - sub_offsets, sub_lengths)
        paths, scores = crf.nbest(emissions[sub_tokens], sub_lengths, self.trans, self.start, self.end, 2)
        second = paths[1]
        has_second = (sub_lengths > 0) & (second[np.minimum(sub_offsets, max(second.size - 1, 0))] >= 0)
        probability = np.where(has_second, np.exp(scores[:, 1] - fb.log_z[seqs]), 0.0)
        sp_seq, sp_first, sp_stop, sp_type = spans_from_label_ids(np.maximum(second, 0), sub_lengths,
                                                                  self.model.labels)
        lines_of_sub = batch.seq_line[seqs].tolist()
        for k, line_index in enumerate(lines_of_sub):
            results[line_index].runner_up = []
            results[line_index].runner_up_probability = float(probability[k])
        line_offsets = np.cumsum(tokens.counts) - tokens.counts
        keep = has_second[sp_seq]
        for k, first, stop, type_index in zip(sp_seq[keep].tolist(), sp_first[keep].tolist(),
                                              sp_stop[keep].tolist(), sp_type[keep].tolist()):
            result = results[lines_of_sub[k]]
            base = int(line_offsets[lines_of_sub[k]])
            start, end = int(tokens.starts[base + first]), int(tokens.ends[base + stop - 1])
            result.runner_up.append(TaggedSpan(start, end, self.entity_types[type_index], result.text[start:end],
                                               None))
