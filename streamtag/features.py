"""Feature spec and extractor: a batch of token lists -> a binary CSR matrix for a linear-chain CRF.

Every token is described by *feature strings* such as ``lower=sshd`` or ``shape=Xxxx``. The spec
(``config/features.toml``) chooses which groups of strings a token gets for itself (offset 0) and which
groups each neighbour at offset ``d`` lends it, written ``"-1|lower=sshd"``. Position features
(``bias``, ``pos=first``, ``pos=last``, ``rel=b``) and boundary markers (``"-1|BOS"``, ``"+1|EOS"``, when
the neighbour is off the line) complete a row. A vocabulary maps feature strings to column ids;
features outside the vocabulary are ignored.

Speed comes from caching: everything a token contributes depends only on its text and kind, so for each
distinct (text, kind) the ids it adds at every offset are computed once and cached. A batch then needs
one dict lookup per token (to find its type) and a handful of numpy operations to gather the cached ids
into CSR rows.
"""

from __future__ import annotations

import re
import tomllib
from collections.abc import Callable, Iterable, Sequence
from dataclasses import dataclass
from importlib import resources
from itertools import chain, islice
from pathlib import Path

import numpy as np
from scipy.sparse import csr_matrix

from streamtag.errors import ConfigError, DataError

SPEC_VERSION = 1

# Groups a token or a neighbour can contribute. Order here fixes the order of strings per token.
GROUPS: tuple[str, ...] = (
    "lower", "shape", "collapsed_shape", "prefix", "suffix", "flags", "kind", "length", "wordlists",
)

BOUNDARY_BEFORE = "BOS"   # neighbour offset falls before the first token of the line
BOUNDARY_AFTER = "EOS"    # neighbour offset falls after the last token of the line


# --- token description ------------------------------------------------------------------------------

def _shape_char(char: str) -> str:
    """One character of a word shape: X upper, x other letters, d digit, anything else kept."""
    if char.isupper():
        return "X"
    if char.isalpha():
        return "x"
    if char.isdigit():
        return "d"
    return char


class _ShapeTable(dict):
    """str.translate table that fills itself: each code point is classified once, then looked up in C."""

    def __missing__(self, code: int) -> str:
        shape = _shape_char(chr(code))
        self[code] = shape
        return shape


_SHAPE_TABLE = _ShapeTable()
_RUNS = re.compile(r"(.)\1+", re.DOTALL)


def word_shape(text: str) -> str:
    """'Host' -> 'Xxxx', '2024' -> 'dddd', 'eth0:1' -> 'xxxd:d' (common practice word shape)."""
    return text.translate(_SHAPE_TABLE)


def collapse_runs(shape: str) -> str:
    """'Xxxx' -> 'Xx', 'dddd' -> 'd', 'dd.dd' -> 'd.d': each run of one character becomes one."""
    return _RUNS.sub(r"\1", shape)


# Character-class flags, computed from the text and its shape (the shape makes the class tests cheap:
# 'X', 'x' and 'd' appear in a shape only as classes, never as literal characters).
FLAGS: dict[str, Callable[[str, str], bool]] = {
    "has_digit": lambda text, shape: "d" in shape,
    "all_digit": lambda text, shape: not shape.strip("d"),
    "has_alpha": lambda text, shape: "X" in shape or "x" in shape,
    "has_upper": lambda text, shape: "X" in shape,
    "has_lower": lambda text, shape: "x" in shape,
    "all_upper": lambda text, shape: text.isupper(),
    "all_lower": lambda text, shape: text.islower(),
    "title": lambda text, shape: text.istitle(),
    "initial_upper": lambda text, shape: shape[:1] == "X",
    "mixed_alnum": lambda text, shape: "d" in shape and ("X" in shape or "x" in shape),
    "no_alnum": lambda text, shape: not ("d" in shape or "X" in shape or "x" in shape),
    "has_dash": lambda text, shape: "-" in text,
    "has_dot": lambda text, shape: "." in text,
    "has_underscore": lambda text, shape: "_" in text,
    "has_slash": lambda text, shape: "/" in text,
    "has_colon": lambda text, shape: ":" in text,
    "has_at": lambda text, shape: "@" in text,
    "has_equals": lambda text, shape: "=" in text,
}


# --- the spec ---------------------------------------------------------------------------------------

@dataclass(frozen=True)
class WindowOffset:
    """Features a neighbour at `offset` (never 0) lends to a token."""

    offset: int
    groups: tuple[str, ...]


@dataclass(frozen=True)
class FeatureSpec:
    """Which features the extractor produces. Built from TOML or from the dict stored in a model."""

    token_groups: tuple[str, ...] = ("lower", "shape", "collapsed_shape", "prefix", "suffix", "flags",
                                     "kind")
    max_value_chars: int = 32
    prefix_lengths: tuple[int, ...] = (1, 2, 3)
    suffix_lengths: tuple[int, ...] = (1, 2, 3)
    flags: tuple[str, ...] = tuple(FLAGS)
    length_bounds: tuple[int, ...] = (1, 2, 3, 4, 6, 8, 12, 16, 24, 32)
    first_last: bool = True
    relative_buckets: int = 0
    window: tuple[WindowOffset, ...] = ()
    wordlists: tuple[tuple[str, frozenset[str]], ...] = ()   # (name, lower-cased words), by name

    # -- construction --

    @classmethod
    def from_toml(cls, path) -> FeatureSpec:
        """Read a spec file; word list paths are relative to the file. ConfigError on any problem."""
        path = Path(path)
        try:
            with open(path, "rb") as handle:
                raw = tomllib.load(handle)
        except OSError as error:
            raise ConfigError(f"{path}: cannot read feature spec: {error.strerror or error}") from None
        except tomllib.TOMLDecodeError as error:
            raise ConfigError(f"{path}: not valid TOML: {_one_line(str(error))}") from None
        return cls.from_dict(raw, base_dir=path.parent, source=str(path))

    @classmethod
    def from_dict(cls, d: dict, base_dir=None, source: str = "feature spec") -> FeatureSpec:
        """Build from a dict (parsed TOML or `to_dict` output). Word lists may be lists of words
        (embedded) or file paths (relative to `base_dir`, default the working directory)."""
        return _SpecParser(source, Path(base_dir) if base_dir is not None else Path.cwd()).parse(d)

    @classmethod
    def default(cls) -> FeatureSpec:
        """The spec shipped with the package (a copy of config/features.toml)."""
        with resources.as_file(resources.files("streamtag") / "defaults" / "features.toml") as path:
            return cls.from_toml(path)

    def to_dict(self) -> dict:
        """JSON-serialisable and self-contained (word list contents embedded); from_dict inverts it."""
        return {
            "version": SPEC_VERSION,
            "token": {
                "groups": list(self.token_groups),
                "max_value_chars": self.max_value_chars,
                "prefix_lengths": list(self.prefix_lengths),
                "suffix_lengths": list(self.suffix_lengths),
                "flags": list(self.flags),
                "length_bounds": list(self.length_bounds),
            },
            "position": {"first_last": self.first_last, "relative_buckets": self.relative_buckets},
            "window": [{"offset": w.offset, "groups": list(w.groups)} for w in self.window],
            "wordlists": {name: sorted(words) for name, words in self.wordlists},
        }

    # -- feature strings of one token type --

    def offsets(self) -> tuple[int, ...]:
        """0 (the token itself) followed by the window offsets, in spec order."""
        return (0,) + tuple(w.offset for w in self.window)

    def groups_at(self) -> tuple[tuple[str, ...], ...]:
        """Groups used at each entry of `offsets()`."""
        return (self.token_groups,) + tuple(w.groups for w in self.window)

    def group_strings(self, text: str, kind: str, groups: Iterable[str]) -> dict[str, list[str]]:
        """Feature strings (without offset prefix) of one token for each requested group."""
        shape = word_shape(text)
        lower = text.lower()
        cut = self.max_value_chars
        out: dict[str, list[str]] = {}
        for group in groups:
            if group == "lower":
                out[group] = ["lower=" + lower[:cut]]
            elif group == "shape":
                out[group] = ["shape=" + shape[:cut]]
            elif group == "collapsed_shape":
                out[group] = ["cshape=" + collapse_runs(shape)[:cut]]
            elif group == "prefix":
                out[group] = [f"p{n}={lower[:n]}" for n in self.prefix_lengths if len(lower) >= n]
            elif group == "suffix":
                out[group] = [f"s{n}={lower[-n:]}" for n in self.suffix_lengths if len(lower) >= n]
            elif group == "flags":
                out[group] = ["flag=" + name for name in self.flags if FLAGS[name](text, shape)]
            elif group == "kind":
                out[group] = ["kind=" + kind]
            elif group == "length":
                out[group] = [_length_feature(len(text), self.length_bounds)]
            elif group == "wordlists":
                out[group] = ["list=" + name for name, words in self.wordlists if lower in words]
        return out

    def type_strings(self, text: str, kind: str) -> list[list[str]]:
        """For each entry of `offsets()`, the feature strings this token type contributes there."""
        groups_at = self.groups_at()
        values = self.group_strings(text, kind, set(chain.from_iterable(groups_at)))
        result = []
        for offset, groups in zip(self.offsets(), groups_at):
            prefix = _offset_prefix(offset)
            result.append([prefix + s for group in groups for s in values[group]])
        return result


def _offset_prefix(offset: int) -> str:
    return "" if offset == 0 else f"{offset:+d}|"


def _boundary_feature(offset: int) -> str:
    return _offset_prefix(offset) + (BOUNDARY_BEFORE if offset < 0 else BOUNDARY_AFTER)


def _length_feature(length: int, bounds: Sequence[int]) -> str:
    for bound in bounds:
        if length <= bound:
            return f"len<={bound}"
    return f"len>{bounds[-1]}" if bounds else "len>0"


def _one_line(text: str) -> str:
    return " ".join(text.split())


_NAME = re.compile(r"[a-z][a-z0-9_]*\Z")


class _SpecParser:
    """Validates a spec dict; every error is one line naming the source and the dotted key."""

    TOP_KEYS = {"version", "token", "position", "window", "wordlists"}
    TOKEN_KEYS = {"groups", "max_value_chars", "prefix_lengths", "suffix_lengths", "flags",
                  "length_bounds"}
    POSITION_KEYS = {"first_last", "relative_buckets"}
    WINDOW_KEYS = {"offset", "groups"}

    def __init__(self, source: str, base_dir: Path):
        self.source = source
        self.base_dir = base_dir

    def fail(self, key: str, problem: str) -> ConfigError:
        return ConfigError(f"{self.source}: {key}: {problem}")

    def parse(self, d) -> FeatureSpec:
        table = self.table(d, "(top level)", self.TOP_KEYS, "")
        version = table.get("version", SPEC_VERSION)
        if type(version) is not int or version != SPEC_VERSION:
            raise self.fail("version", f"must be {SPEC_VERSION}, got {version!r}")
        token = self.table(table.get("token", {}), "token", self.TOKEN_KEYS, "token.")
        position = self.table(table.get("position", {}), "position", self.POSITION_KEYS, "position.")
        defaults = FeatureSpec()
        return FeatureSpec(
            token_groups=self.groups(token.get("groups", list(defaults.token_groups)), "token.groups"),
            max_value_chars=self.positive_int(token.get("max_value_chars", defaults.max_value_chars),
                                              "token.max_value_chars"),
            prefix_lengths=self.int_list(token.get("prefix_lengths", list(defaults.prefix_lengths)),
                                         "token.prefix_lengths"),
            suffix_lengths=self.int_list(token.get("suffix_lengths", list(defaults.suffix_lengths)),
                                         "token.suffix_lengths"),
            flags=self.names(token.get("flags", list(defaults.flags)), "token.flags", FLAGS),
            length_bounds=self.int_list(token.get("length_bounds", list(defaults.length_bounds)),
                                        "token.length_bounds", ascending=True),
            first_last=self.boolean(position.get("first_last", defaults.first_last),
                                    "position.first_last"),
            relative_buckets=self.count(position.get("relative_buckets", defaults.relative_buckets),
                                        "position.relative_buckets"),
            window=self.window(table.get("window", [])),
            wordlists=self.wordlists(table.get("wordlists", {})),
        )

    def table(self, value, name: str, allowed: set[str], prefix: str) -> dict:
        if not isinstance(value, dict):
            raise self.fail(name, f"must be a table, got {type(value).__name__}")
        for key in value:
            if key not in allowed:
                raise self.fail(prefix + str(key), f"unknown key (known: {', '.join(sorted(allowed))})")
        return value

    def positive_int(self, value, key: str) -> int:
        if type(value) is not int or value < 1:
            raise self.fail(key, f"must be a positive integer, got {value!r}")
        return value

    def count(self, value, key: str) -> int:
        if type(value) is not int or value < 0:
            raise self.fail(key, f"must be an integer >= 0, got {value!r}")
        return value

    def boolean(self, value, key: str) -> bool:
        if type(value) is not bool:
            raise self.fail(key, f"must be true or false, got {value!r}")
        return value

    def int_list(self, value, key: str, ascending: bool = False) -> tuple[int, ...]:
        if not isinstance(value, list) or any(type(v) is not int or v < 1 for v in value):
            raise self.fail(key, f"must be a list of positive integers, got {value!r}")
        if ascending and any(a >= b for a, b in zip(value, value[1:])):
            raise self.fail(key, "must be strictly ascending")
        if not ascending:
            value = sorted(set(value))
        return tuple(value)

    def names(self, value, key: str, known) -> tuple[str, ...]:
        if not isinstance(value, list) or any(not isinstance(v, str) for v in value):
            raise self.fail(key, f"must be a list of strings, got {value!r}")
        for name in value:
            if name not in known:
                raise self.fail(key, f"unknown name {name!r} (known: {', '.join(known)})")
        return tuple(dict.fromkeys(value))   # drop repeats so no feature is produced twice

    def groups(self, value, key: str) -> tuple[str, ...]:
        return self.names(value, key, GROUPS)

    def window(self, value) -> tuple[WindowOffset, ...]:
        if not isinstance(value, list):
            raise self.fail("window", f"must be an array of tables, got {type(value).__name__}")
        seen: set[int] = set()
        result = []
        for index, entry in enumerate(value):
            name = f"window[{index}]"
            entry = self.table(entry, name, self.WINDOW_KEYS, name + ".")
            if "offset" not in entry:
                raise self.fail(name + ".offset", "missing")
            offset = entry["offset"]
            if type(offset) is not int or offset == 0:
                raise self.fail(name + ".offset", f"must be a non-zero integer, got {offset!r}")
            if offset in seen:
                raise self.fail(name + ".offset", f"offset {offset} appears twice")
            seen.add(offset)
            result.append(WindowOffset(offset, self.groups(entry.get("groups", []), name + ".groups")))
        return tuple(result)

    def wordlists(self, value) -> tuple[tuple[str, frozenset[str]], ...]:
        if not isinstance(value, dict):
            raise self.fail("wordlists", f"must be a table, got {type(value).__name__}")
        result = []
        for name in sorted(value):
            key = f"wordlists.{name}"
            if not _NAME.match(name):
                raise self.fail(key, "name must be lower-case letters, digits and '_'")
            entry = value[name]
            if isinstance(entry, str):
                words = self.read_wordlist(self.base_dir / entry, key)
            elif isinstance(entry, list) and all(isinstance(w, str) for w in entry):
                words = entry
            else:
                raise self.fail(key, "must be a file path or a list of words")
            result.append((name, frozenset(w.lower() for w in words)))
        return tuple(result)

    def read_wordlist(self, path: Path, key: str) -> list[str]:
        """One word a line; blank lines and lines starting with '#' are skipped."""
        try:
            text = path.read_text(encoding="utf-8")
        except (OSError, UnicodeDecodeError) as error:
            reason = getattr(error, "strerror", None) or _one_line(str(error))
            raise self.fail(key, f"cannot read word list {path}: {reason}") from None
        lines = (line.strip() for line in text.splitlines())
        return [line for line in lines if line and not line.startswith("#")]


# --- the extractor ----------------------------------------------------------------------------------

def _ragged_gather(source: np.ndarray, starts: np.ndarray, counts: np.ndarray) -> np.ndarray:
    """Concatenate source[starts[k] : starts[k] + counts[k]] for all k, without a Python loop.

    starts, counts: (M,) int64 -> (counts.sum(),)
    """
    total = int(counts.sum())
    if total == 0:
        return source[:0]
    out_starts = np.cumsum(counts) - counts
    positions = np.arange(total, dtype=np.int64) + np.repeat(starts - out_starts, counts)
    return source[positions]


class _RowBuilder:
    """Builds CSR index arrays for batches under one feature-string -> id mapping.

    `lookup(feature_string)` returns an id or None (feature ignored). The cache holds, per token type,
    one int64 array: K per-offset counts followed by the ids of all offsets concatenated.
    """

    def __init__(self, spec: FeatureSpec, lookup: Callable[[str], int | None], cache_size: int):
        self.spec = spec
        self.lookup = lookup
        self.cache_size = max(1, int(cache_size))
        self.cache: dict[tuple[str, str], np.ndarray] = {}
        self.offsets = np.array(spec.offsets(), dtype=np.int64)
        self._build_constants()

    def _build_constants(self) -> None:
        """Ids of the position features: bias, first, last, relative buckets, one boundary per offset."""
        names = ["bias", "pos=first", "pos=last"]
        names += [f"rel={b}" for b in range(self.spec.relative_buckets)]
        names += [_boundary_feature(int(o)) for o in self.offsets[1:]]
        ids = [self.lookup(name) for name in names]
        self.constants = np.array([-1 if i is None else i for i in ids], dtype=np.int64)
        self.constant_known = (self.constants >= 0).astype(np.int64)
        if not self.spec.first_last:
            self.constant_known[1:3] = 0
        self.rel_base = 3
        self.boundary_base = 3 + self.spec.relative_buckets

    def encode_type(self, key: tuple[str, str]) -> np.ndarray:
        """Per-offset counts then ids for one (text, kind): (K + total ids,) int64."""
        lookup = self.lookup
        counts, ids = [], []
        for strings in self.spec.type_strings(*key):
            found = [i for i in map(lookup, strings) if i is not None]
            counts.append(len(found))
            ids.extend(found)
        return np.array(counts + ids, dtype=np.int64)

    def entries_for(self, keys: Iterable[tuple[str, str]]) -> list[np.ndarray]:
        # Loop over distinct types of the batch only; most are cache hits.
        cache = self.cache
        entries = []
        for key in keys:
            entry = cache.get(key)
            if entry is None:
                entry = self.encode_type(key)
                if len(cache) >= self.cache_size:
                    cache.clear()   # crude but O(1) amortised; the next batches refill what they use
                cache[key] = entry
            entries.append(entry)
        return entries

    def build(self, sentences: Sequence[tuple[list[str], list[str]]]):
        """-> (indices (nnz,), indptr (N+1,), lengths (B,)) int64 arrays for the batch."""
        lengths = np.fromiter((len(texts) for texts, _ in sentences), dtype=np.int64,
                              count=len(sentences))
        for number, (texts, kinds) in enumerate(sentences):
            if len(texts) != len(kinds):
                raise DataError(f"sentence {number}: {len(texts)} tokens but {len(kinds)} kinds")
        n_tokens = int(lengths.sum())
        if n_tokens == 0:
            return np.zeros(0, np.int64), np.zeros(1, np.int64), lengths

        # The only per-token Python work: pair text with kind and find its type index (C-level loops).
        keys = list(zip(chain.from_iterable(s[0] for s in sentences),
                        chain.from_iterable(s[1] for s in sentences)))
        type_index = dict.fromkeys(keys)
        for number, key in enumerate(type_index):
            type_index[key] = number
        token_type = np.fromiter(map(type_index.__getitem__, keys), dtype=np.int64, count=n_tokens)
        entries = self.entries_for(type_index)

        # Flat source array: constants first, then every type's entry.
        k = len(self.offsets)
        entry_lengths = np.fromiter(map(len, entries), dtype=np.int64, count=len(entries))
        n_const = len(self.constants)
        entry_base = n_const + np.cumsum(entry_lengths) - entry_lengths            # (U,)
        source = np.concatenate([self.constants, *entries])
        type_counts = source[entry_base[:, None] + np.arange(k)]                   # (U, K)
        type_starts = entry_base[:, None] + k + np.cumsum(type_counts, axis=1) - type_counts

        # Position of each token in its line.
        line_start = np.repeat(np.cumsum(lengths) - lengths, lengths)             # (N,)
        line_length = np.repeat(lengths, lengths)
        position = np.arange(n_tokens, dtype=np.int64) - line_start

        # Segments per row: bias, first, last, [relative], offset 0, window offsets.
        n_seg = 3 + (1 if self.spec.relative_buckets else 0) + k
        seg_start = np.zeros((n_tokens, n_seg), dtype=np.int64)
        seg_count = np.zeros((n_tokens, n_seg), dtype=np.int64)
        known = self.constant_known
        seg_start[:, 0], seg_count[:, 0] = 0, known[0]
        seg_start[:, 1], seg_count[:, 1] = 1, known[1] * (position == 0)
        seg_start[:, 2], seg_count[:, 2] = 2, known[2] * (position == line_length - 1)
        column = 3
        if self.spec.relative_buckets:
            bucket = position * self.spec.relative_buckets // line_length
            seg_start[:, column] = self.rel_base + bucket
            seg_count[:, column] = known[self.rel_base + bucket]
            column += 1
        for slot, offset in enumerate(self.offsets):
            neighbour_position = position + offset
            inside = (neighbour_position >= 0) & (neighbour_position < line_length)
            neighbour_type = token_type[np.where(inside, np.arange(n_tokens) + offset, 0)]
            if slot == 0:
                seg_start[:, column] = type_starts[neighbour_type, 0]
                seg_count[:, column] = type_counts[neighbour_type, 0]
            else:
                boundary = self.boundary_base + slot - 1
                seg_start[:, column] = np.where(inside, type_starts[neighbour_type, slot], boundary)
                seg_count[:, column] = np.where(inside, type_counts[neighbour_type, slot],
                                                known[boundary])
            column += 1

        indices = _ragged_gather(source, seg_start.ravel(), seg_count.ravel())
        indptr = np.zeros(n_tokens + 1, dtype=np.int64)
        np.cumsum(seg_count.sum(axis=1), out=indptr[1:])
        return indices, indptr, lengths


class FeatureExtractor:
    """Batch of (texts, kinds) -> binary CSR matrix (N, F) over a fixed vocabulary."""

    def __init__(self, spec: FeatureSpec, vocabulary: list[str] | None = None,
                 cache_size: int = 100_000):
        self.spec = spec
        self.cache_size = cache_size
        self.vocabulary = list(vocabulary) if vocabulary is not None else []

    @property
    def vocabulary(self) -> list[str]:
        return self._vocabulary

    @vocabulary.setter
    def vocabulary(self, vocabulary: list[str]) -> None:
        self._vocabulary = list(vocabulary)
        self.feature_id = {name: number for number, name in enumerate(self._vocabulary)}
        if len(self.feature_id) != len(self._vocabulary):
            raise DataError("feature vocabulary has repeated entries")
        # A new vocabulary means new ids: start a fresh cache.
        self._rows = _RowBuilder(self.spec, self.feature_id.get, self.cache_size)

    @property
    def n_features(self) -> int:
        return len(self._vocabulary)

    def fit(self, sentences: Iterable[tuple[list[str], list[str]]], min_count: int = 1,
            chunk_size: int = 4096) -> list[str]:
        """Count every feature over `sentences` (tokens it is active on) and keep those seen at least
        `min_count` times, sorted. Sets and returns the vocabulary."""
        if type(min_count) is not int or min_count < 1:
            raise ConfigError(f"min_count: must be a positive integer, got {min_count!r}")
        provisional: dict[str, int] = {}

        def grow(name: str) -> int:
            return provisional.setdefault(name, len(provisional))

        rows = _RowBuilder(self.spec, grow, self.cache_size)
        counts = np.zeros(0, dtype=np.int64)
        iterator = iter(sentences)
        while chunk := list(islice(iterator, chunk_size)):
            indices, _, _ = rows.build(chunk)
            chunk_counts = np.bincount(indices, minlength=len(provisional))
            counts = np.pad(counts, (0, len(chunk_counts) - len(counts)))
            counts += chunk_counts
        counts = np.pad(counts, (0, len(provisional) - len(counts)))
        self.vocabulary = sorted(name for name, number in provisional.items()
                                 if counts[number] >= min_count)
        return self.vocabulary

    def transform(self, sentences: Sequence[tuple[list[str], list[str]]]):
        """-> X (N, F) float64 CSR with 1.0 per active feature, lengths (B,) int64.

        N is the total number of tokens of the B sentences, rows in sentence order. Features not in the
        vocabulary are dropped. Each row holds each column at most once (groups, offsets and names are
        kept distinct by the spec parser), so no entry ever exceeds 1.0.
        """
        sentences = sentences if isinstance(sentences, Sequence) else list(sentences)
        indices, indptr, lengths = self._rows.build(sentences)
        data = np.ones(len(indices), dtype=np.float64)
        matrix = csr_matrix((data, indices, indptr), shape=(len(indptr) - 1, self.n_features))
        return matrix, lengths

    def feature_strings(self, texts: list[str], kinds: list[str]) -> list[list[str]]:
        """All feature strings of each token of one line, vocabulary or not (for inspection)."""
        if len(texts) != len(kinds):
            raise DataError(f"{len(texts)} tokens but {len(kinds)} kinds")
        spec = self.spec
        per_type = [spec.type_strings(text, kind) for text, kind in zip(texts, kinds)]
        n = len(texts)
        rows = []
        for position in range(n):
            row = ["bias"]
            if spec.first_last and position == 0:
                row.append("pos=first")
            if spec.first_last and position == n - 1:
                row.append("pos=last")
            if spec.relative_buckets:
                row.append(f"rel={position * spec.relative_buckets // n}")
            for slot, offset in enumerate(spec.offsets()):
                neighbour = position + offset
                if 0 <= neighbour < n:
                    row.extend(per_type[neighbour][slot])
                else:
                    row.append(_boundary_feature(offset))
            rows.append(row)
        return rows


def default_spec_path() -> Path:
    """Location of the packaged default spec (may be inside a zip; use FeatureSpec.default to load)."""
    return Path(str(resources.files("streamtag") / "defaults" / "features.toml"))


__all__ = ["FeatureSpec", "FeatureExtractor", "WindowOffset", "GROUPS", "FLAGS", "word_shape",
           "collapse_runs", "default_spec_path", "SPEC_VERSION"]
