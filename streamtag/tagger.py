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
from streamtag.features import FeatureExtractor, FeatureSpec
from streamtag.model import Model
from streamtag.spans import spans_from_label_ids
from streamtag.tokenize import TokenList, tokenize

DEFAULT_MAX_TOKENS = 256
DEFAULT_WINDOW_OVERLAP = 32


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
class _Batch:
    """Token sequences cut from the lines: one per line, or several windows for a long line.

    ``seq_line`` (S,) maps each sequence to its line; ``seq_first_token`` (S,) is the index, within
    its line, of the sequence's first token; ``owned_from``/``owned_to`` (S,) is the token range,
    within the line, whose labels this sequence decides (windows overlap; each token has one owner).
    """

    token_lists: list[TokenList]
    seq_line: np.ndarray
    seq_first_token: np.ndarray
    owned_from: np.ndarray
    owned_to: np.ndarray
    lengths: np.ndarray


class Tagger:
    """Tags batches of lines with one model. Cheap to call repeatedly; caches token features."""

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
        self.entity_types = [label[2:] for label in model.labels if label.startswith("B-")]
        self.b_index = np.array([model.labels.index("B-" + t) for t in self.entity_types], dtype=np.int64)
        self.i_index = np.array([model.labels.index("I-" + t) for t in self.entity_types], dtype=np.int64)

    @property
    def model_id(self) -> str:
        return self.model.model_id

    def tag(self, lines: list[str], review_below: float | None = None) -> list[TaggedLine]:
        """Tag a batch of lines. Lines whose confidence is below ``review_below`` get a runner-up."""
        if not lines:
            return []
        batch = self._cut(lines)
        texts_kinds = [
            (tokens.texts[first : first + length], tokens.kinds[first : first + length])
            for tokens, first, length in zip(
                (batch.token_lists[i] for i in batch.seq_line), batch.seq_first_token, batch.lengths
            )
        ]
        features, lengths = self.extractor.transform(texts_kinds)
        emissions = np.asarray(features @ self.emission)
        labels, _ = crf.viterbi(emissions, lengths, self.trans, self.start, self.end)
        fb = crf.forward_backward(emissions, lengths, self.trans, self.start, self.end)
        token_conf = crf.token_marginals(fb)[np.arange(labels.size), labels]
        results = self._assemble(lines, batch, labels, token_conf, emissions, fb)
        if review_below is not None:
            self._add_runner_up(results, batch, emissions, fb, review_below)
        return results

    # -- cutting lines into sequences -------------------------------------------------------------

    def _cut(self, lines: list[str]) -> _Batch:
        token_lists = [tokenize(line) for line in lines]
        seq_line, first, owned_from, owned_to, lengths = [], [], [], [], []
        for line_index, tokens in enumerate(token_lists):
            n = len(tokens.texts)
            for start, length, own_from, own_to in self._windows(n):
                seq_line.append(line_index)
                first.append(start)
                lengths.append(length)
                owned_from.append(own_from)
                owned_to.append(own_to)
        as_int = lambda values: np.asarray(values, dtype=np.int64)  # noqa: E731
        return _Batch(token_lists, as_int(seq_line), as_int(first), as_int(owned_from), as_int(owned_to),
                      as_int(lengths))

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

    def _assemble(self, lines, batch, labels, token_conf, emissions, fb) -> list[TaggedLine]:
        seq_of_token = np.repeat(np.arange(batch.lengths.size), batch.lengths)
        pos_in_seq = np.arange(labels.size) - np.repeat(np.cumsum(batch.lengths) - batch.lengths, batch.lengths)
        pos_in_line = pos_in_seq + batch.seq_first_token[seq_of_token]
        owned = (pos_in_line >= batch.owned_from[seq_of_token]) & (pos_in_line < batch.owned_to[seq_of_token])
        split_lines = set(np.flatnonzero(np.bincount(batch.seq_line, minlength=len(lines)) > 1).tolist())

        span_seq, span_first, span_stop, span_type = spans_from_label_ids(labels, batch.lengths, self.model.labels)
        span_conf = np.exp(
            crf.span_log_prob(fb, emissions, batch.lengths, self.trans, self.end, span_seq, span_first, span_stop,
                              self.b_index[span_type], self.i_index[span_type])
        )
        # A window keeps a span only when it owns the span's first token.
        offsets = np.cumsum(batch.lengths) - batch.lengths
        span_keep = owned[offsets[span_seq] + span_first] if span_seq.size else np.zeros(0, bool)

        results = [TaggedLine(text=line, spans=[], confidence=1.0, n_tokens=len(tokens.texts))
                   for line, tokens in zip(lines, batch.token_lists)]
        self._token_floor(results, batch, labels, token_conf, owned, seq_of_token, pos_in_line)
        for s in np.flatnonzero(span_keep):
            line_index = int(batch.seq_line[span_seq[s]])
            tokens = batch.token_lists[line_index]
            first_token = int(batch.seq_first_token[span_seq[s]] + span_first[s])
            last_token = int(batch.seq_first_token[span_seq[s]] + span_stop[s] - 1)
            start, end = tokens.starts[first_token], tokens.ends[last_token]
            label = self.entity_types[span_type[s]]
            conf = float(span_conf[s])
            result = results[line_index]
            result.spans.append(TaggedSpan(start, end, label, result.text[start:end], conf))
            if conf < result.confidence:
                result.confidence = conf
                result.weakest = f"span {result.text[start:end]!r} as {label} at {conf:.3f}"
        for line_index in split_lines:
            results[line_index].flags.append("split")
            results[line_index].spans.sort(key=lambda span: span.start)
        return results

    def _token_floor(self, results, batch, labels, token_conf, owned, seq_of_token, pos_in_line) -> None:
        """Set each line's confidence to its least confident owned token (vectorised per batch)."""
        if labels.size == 0:
            return
        token_line = batch.seq_line[seq_of_token]
        conf = np.where(owned, token_conf, np.inf)
        line_min = np.full(len(results), np.inf)
        np.minimum.at(line_min, token_line, conf)
        # Position of the weakest token: the owned token whose confidence equals its line's minimum.
        is_weakest = owned & (conf == line_min[token_line])
        weakest_tokens = np.flatnonzero(is_weakest)
        seen = set()
        for t in weakest_tokens:
            line_index = int(token_line[t])
            if line_index in seen:
                continue
            seen.add(line_index)
            result = results[line_index]
            tokens = batch.token_lists[line_index]
            position = int(pos_in_line[t])
            result.confidence = float(line_min[line_index])
            label = self.model.labels[labels[t]]
            result.weakest = f"token {tokens.texts[position]!r} as {label} at {result.confidence:.3f}"

    # -- runner-up labelling for doubtful lines -----------------------------------------------------

    def _add_runner_up(self, results, batch, emissions, fb, review_below: float) -> None:
        """Second-best path for lines under the threshold (only those: n-best costs k times Viterbi)."""
        # Split lines get no runner-up: the second-best path of one window is not one of the line.
        doubtful_lines = [i for i, r in enumerate(results) if r.confidence < review_below and "split" not in r.flags]
        if not doubtful_lines:
            return
        doubtful = np.isin(batch.seq_line, doubtful_lines)
        offsets = np.cumsum(batch.lengths) - batch.lengths
        token_index = np.concatenate(
            [np.arange(offsets[s], offsets[s] + batch.lengths[s]) for s in np.flatnonzero(doubtful)]
        ) if doubtful.any() else np.zeros(0, np.int64)
        sub_lengths = batch.lengths[doubtful]
        paths, scores = crf.nbest(emissions[token_index], sub_lengths, self.trans, self.start, self.end, 2)
        sub_log_z = fb.log_z[doubtful]
        sub_offsets = np.cumsum(sub_lengths) - sub_lengths
        for k, s in enumerate(np.flatnonzero(doubtful)):
            line_index = int(batch.seq_line[s])
            result = results[line_index]
            result.runner_up = []
            second = paths[1, sub_offsets[k] : sub_offsets[k] + sub_lengths[k]]
            if sub_lengths[k] == 0 or second[0] < 0:
                result.runner_up_probability = 0.0  # no other valid labelling exists
                continue
            result.runner_up_probability = float(np.exp(scores[k, 1] - sub_log_z[k]))
            tokens = batch.token_lists[line_index]
            first_token = int(batch.seq_first_token[s])
            sp_seq, sp_first, sp_stop, sp_type = spans_from_label_ids(
                second, np.array([sub_lengths[k]]), self.model.labels)
            for first, stop, type_index in zip(sp_first, sp_stop, sp_type):
                start, end = tokens.starts[first_token + first], tokens.ends[first_token + stop - 1]
                result.runner_up.append(
                    TaggedSpan(start, end, self.entity_types[type_index], result.text[start:end], None)
                )
