"""Feature spec and extractor: a batch of token lists -> a binary CSR matrix for a linear-chain CRF.

Every token is described by *feature strings* such as ``lower=sshd`` or ``shape=Xxxx``. The spec
(``config/features.toml``) chooses which groups of strings a token gets for itself (offset 0) and which
groups each neighbour at offset ``d`` lends it, written ``"-1|lower=sshd"``. Position features
(``bias``, ``pos=first``, ``pos=last``, ``rel=b``) and boundary markers (``"-1|BOS"``, ``"+1|EOS"``, when
the neighbour is off the line) complete a row. A vocabulary maps feature strings to column ids;
features outside the vocabulary are ignored.

Speed comes from caching: everything a token contributes depends only on its text and kind, so for each
distinct (text, kind) the ids it adds at every offset are computed once and cached (bounded; the cache
is emptied when full). A batch then needs one dict lookup per token (to find its type) and a fixed
number of numpy operations to gather the cached ids into CSR rows. New types are the costly part; the
vocabulary is indexed by feature value without offset label, so a new token costs one dict lookup per
value (its lower form, each affix), and its shape-and-kind features are cached per distinct shape.
"""

from __future__ import annotations

import re
import tomllib
from collections.abc import Callable, Iterable, Sequence
from dataclasses import dataclass
from importlib import resources
from itertools import chain, groupby, islice, repeat
from operator import contains, itemgetter
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
        if len(self) < 70_000:   # bounded: hostile input cannot grow it to all of Unicode
            self[code] = shape
        return shape


_SHAPE_TABLE = _ShapeTable()


def word_shape(text: str) -> str:
    """'Host' -> 'Xxxx', '2024' -> 'dddd', 'eth0:1' -> 'xxxd:d' (common practice word shape).

    One shape character per code point, so len(word_shape(t)) == len(t).
    """
    return text.translate(_SHAPE_TABLE)


def collapse_runs(shape: str) -> str:
    """'Xxxx' -> 'Xx', 'dddd' -> 'd', 'dd.dd' -> 'd.d': each run of one character becomes one."""
    # groupby is several times faster here than a back-referencing regex substitution
    return "".join(char for char, _ in groupby(shape))


# Character-class flags. Most are functions of the word shape alone ('X', 'x' and 'd' appear in a shape
# only as classes, other characters literally), which lets the extractor cache them per shape; the
# three that follow Python's str case predicates need the text itself. The emission scorer groups
# shapes by the flag characters they hold (`_FLAG_CHARS`): a new shape flag may test only the presence
# of characters listed there, or the first character.
SHAPE_FLAGS: dict[str, Callable[[str], bool]] = {
    "has_digit": lambda shape: "d" in shape,
    "all_digit": lambda shape: not shape.strip("d"),
    "has_alpha": lambda shape: "X" in shape or "x" in shape,
    "has_upper": lambda shape: "X" in shape,
    "has_lower": lambda shape: "x" in shape,
    "initial_upper": lambda shape: shape[:1] == "X",
    "mixed_alnum": lambda shape: "d" in shape and ("X" in shape or "x" in shape),
    "no_alnum": lambda shape: not ("d" in shape or "X" in shape or "x" in shape),
    "has_dash": lambda shape: "-" in shape,
    "has_dot": lambda shape: "." in shape,
    "has_underscore": lambda shape: "_" in shape,
    "has_slash": lambda shape: "/" in shape,
    "has_colon": lambda shape: ":" in shape,
    "has_at": lambda shape: "@" in shape,
    "has_equals": lambda shape: "=" in shape,
}
TEXT_FLAGS: dict[str, Callable[[str], bool]] = {
    "all_upper": str.isupper,
    "all_lower": str.islower,
    "title": str.istitle,
}
FLAGS: tuple[str, ...] = (
    "has_digit", "all_digit", "has_alpha", "has_upper", "has_lower", "all_upper", "all_lower",
    "title", "initial_upper", "mixed_alnum", "no_alnum", "has_dash", "has_dot", "has_underscore",
    "has_slash", "has_colon", "has_at", "has_equals",
)


def flag_holds(name: str, text: str, shape: str) -> bool:
    if name in TEXT_FLAGS:
        return TEXT_FLAGS[name](text)
    return SHAPE_FLAGS[name](shape)


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
    flags: tuple[str, ...] = FLAGS
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
                out[group] = ["flag=" + name for name in self.flags if flag_holds(name, text, shape)]
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

# Column ids, counts and offsets inside one batch: int32 halves the memory traffic of the gathers and
# is scipy's own index type for matrices this size (a batch would need ~2**31 entries to overflow).
_ID = np.int32


def _ragged_gather(source: np.ndarray, starts: np.ndarray, counts: np.ndarray) -> np.ndarray:
    """Concatenate source[starts[k] : starts[k] + counts[k]] for all k, without a Python loop.

    starts, counts: (M,) int32 -> (counts.sum(),)
    """
    total = int(counts.sum(dtype=np.int64))
    if total >= np.iinfo(_ID).max:
        raise DataError(f"batch too large for one feature matrix ({total} entries); use smaller batches")
    if total == 0:
        return source[:0]
    out_starts = np.cumsum(counts, dtype=_ID) - counts
    positions = np.arange(total, dtype=_ID) + np.repeat(starts - out_starts, counts)
    return source[positions]


_SHAPE_GROUPS = ("shape", "collapsed_shape", "kind", "length")
# Types with longer texts are not cached: they are rare and seldom repeat, and caching them would let a
# log full of long distinct tokens fill memory with cache_size of them.
_MAX_CACHED_CHARS = 256
_TEXT_GROUPS = ("lower", "prefix", "suffix", "wordlists")
_AFFIX = re.compile(r"([ps])\d+=")


def _group_of(head: str) -> str | None:
    """Group that produces a feature string, from the part before its first '=' (offset label
    removed): "lower" -> lower, "p3" -> prefix, "len<" -> length; None for position features."""
    group = {"lower": "lower", "shape": "shape", "cshape": "collapsed_shape", "kind": "kind",
             "flag": "flags", "list": "wordlists"}.get(head)
    if group is not None:
        return group
    if head.startswith("len"):
        return "length"
    if _AFFIX.fullmatch(head + "="):
        return "prefix" if head[0] == "p" else "suffix"
    return None


# A token type's contribution is a list of (slot, id) pairs: slot k is the k-th entry of
# FeatureSpec.offsets() (0 = the token itself). Each pair travels as one int, slot << 32 | id, so that
# encoders can append them with C-level list operations; _RowBuilder unpacks and lays them out per
# slot with numpy for all new types of a batch.
_SLOT_SHIFT = 32
Pairs = tuple[int, ...]


def _pair(slot: int, number: int) -> int:
    return (slot << _SLOT_SHIFT) | number


class _VocabularyEncoder:
    """(text, kind) -> known (slot, id) pairs, with one dict lookup per distinct feature value.

    The vocabulary is indexed by feature string *without* offset label: "p3=557" -> the (slot, id)
    of "p3=557", "+1|p3=557", ... that are in the vocabulary (and whose group the spec uses at that
    slot). So a new token costs one lookup per value (its lower form, each affix, ...), not one per
    value and slot, and values never seen in training cost nothing more. Shape-and-kind features
    (shape, collapsed shape, kind, length, shape flags) are cached per distinct (shape, kind): new
    tokens in logs (numbers, ids, timestamps) share a handful of shapes.
    """

    def __init__(self, spec: FeatureSpec, feature_id: dict[str, int], cache_size: int):
        self.spec = spec
        self.cache_size = cache_size
        self.shape_cache: dict[tuple[str, str], Pairs] = {}
        # Affix features depend only on the first (last) max-length characters: timestamps, ports and
        # ids share them far more often than whole texts, so they are cached by that key.
        self.prefix_cache: dict[str, Pairs] = {}
        self.suffix_cache: dict[str, Pairs] = {}
        used = set(chain.from_iterable(spec.groups_at()))
        self.text_flags = [(name, TEXT_FLAGS[name]) for name in spec.flags if name in TEXT_FLAGS] \
            if "flags" in used else []
        self.shape_flags = [(name, SHAPE_FLAGS[name]) for name in spec.flags if name in SHAPE_FLAGS] \
            if "flags" in used else []
        self.use = {group: group in used for group in GROUPS}
        self.prefix_labels = [f"p{n}=" for n in spec.prefix_lengths] if self.use["prefix"] else []
        self.suffix_labels = [f"s{n}=" for n in spec.suffix_lengths] if self.use["suffix"] else []
        self.index = self._index(feature_id)

    def _index(self, feature_id: dict[str, int]) -> dict[str, Pairs]:
        slot_of = {_offset_prefix(offset): slot for slot, offset in enumerate(self.spec.offsets())}
        groups_at = self.spec.groups_at()
        group_of_head: dict[str, str | None] = {}
        index: dict[str, list[int]] = {}
        for name, number in feature_id.items():
            if name[0] in "+-":     # only window features start with a sign ("-1|lower=...")
                label, _, unlabeled = name.partition("|")
                slot = slot_of.get(label + "|")
            else:
                unlabeled, slot = name, 0
            head = unlabeled.partition("=")[0]
            group = group_of_head.get(head, "")
            if group == "":
                group = group_of_head[head] = _group_of(head)
            if slot is None or group not in groups_at[slot]:
                continue   # a feature this spec never produces (e.g. a boundary marker or "bias")
            index.setdefault(unlabeled, []).append(_pair(slot, number))
        return {name: tuple(pairs) for name, pairs in index.items()}

    def shape_pairs(self, shape: str, kind: str) -> Pairs:
        key = (shape, kind)
        cached = self.shape_cache.get(key)
        if cached is not None:
            return cached
        spec, use = self.spec, self.use
        names = []
        if use["shape"]:
            names.append("shape=" + shape[:spec.max_value_chars])
        if use["collapsed_shape"]:
            names.append("cshape=" + collapse_runs(shape)[:spec.max_value_chars])
        if use["kind"]:
            names.append("kind=" + kind)
        if use["length"]:
            names.append(_length_feature(len(shape), spec.length_bounds))
        names += ["flag=" + name for name, holds in self.shape_flags if holds(shape)]
        pairs = tuple(chain.from_iterable(filter(None, map(self.index.get, names))))
        if len(shape) <= _MAX_CACHED_CHARS:
            if len(self.shape_cache) >= self.cache_size:
                self.shape_cache.clear()
            self.shape_cache[key] = pairs
        return pairs

    def append_pairs(self, keys: list[tuple[str, str]], raw: list[int]) -> list[int]:
        """Append the known (slot, id) pairs of each new type to `raw`; returns the count per type.

        One loop over the batch's new types with everything hoisted into locals: this is the costliest
        Python in the extractor (new tokens are a fifth of a live log's tokens), so it is kept flat.
        """
        spec = self.spec
        index_get = self.index.get
        prefix_items = list(zip(spec.prefix_lengths, self.prefix_labels))
        suffix_items = [(-n, label) for n, label in zip(spec.suffix_lengths, self.suffix_labels)]
        longest_prefix = max(spec.prefix_lengths) if prefix_items else 0
        longest_suffix = max(spec.suffix_lengths) if suffix_items else 0
        prefix_cache, suffix_cache = self.prefix_cache, self.suffix_cache
        if len(prefix_cache) + len(suffix_cache) >= self.cache_size:
            prefix_cache.clear()
            suffix_cache.clear()
        lower_label = "lower=" if self.use["lower"] else None
        cut = spec.max_value_chars
        wordlists = spec.wordlists if self.use["wordlists"] else ()
        text_flags = self.text_flags
        shape_cache, shape_pairs, table = self.shape_cache, self.shape_pairs, _SHAPE_TABLE
        counts = []
        for text, kind in keys:
            lower = text.lower()
            before = len(raw)
            if longest_prefix:
                head = lower[:longest_prefix]
                found = prefix_cache.get(head)
                if found is None:
                    found = prefix_cache[head] = tuple(chain.from_iterable(filter(None, map(
                        index_get, [label + head[:n] for n, label in prefix_items if n <= len(head)]))))
                raw += found
            if longest_suffix:
                tail = lower[-longest_suffix:]
                found = suffix_cache.get(tail)
                if found is None:
                    found = suffix_cache[tail] = tuple(chain.from_iterable(filter(None, map(
                        index_get, [label + tail[n:] for n, label in suffix_items if -n <= len(tail)]))))
                raw += found
            names = [lower_label + lower[:cut]] if lower_label is not None else []
            if wordlists:
                names += ["list=" + name for name, words in wordlists if lower in words]
            if text_flags:
                names += ["flag=" + name for name, holds in text_flags if holds(text)]
            raw += chain.from_iterable(filter(None, map(index_get, names)))   # known values only
            shape_key = (text.translate(table), kind)
            shape_part = shape_cache.get(shape_key)
            raw += shape_part if shape_part is not None else shape_pairs(*shape_key)
            counts.append(len(raw) - before)
        return counts


class _CountingEncoder:
    """(text, kind) -> (slot, provisional id) of every feature, adding new strings as they come (fit)."""

    def __init__(self, spec: FeatureSpec, provisional: dict[str, int]):
        self.spec = spec
        self.provisional = provisional

    def append_pairs(self, keys: list[tuple[str, str]], raw: list[int]) -> list[int]:
        provisional = self.provisional
        counts = []
        for text, kind in keys:
            before = len(raw)
            for slot, strings in enumerate(self.spec.type_strings(text, kind)):
                raw += [_pair(slot, provisional.setdefault(name, len(provisional))) for name in strings]
            counts.append(len(raw) - before)
        return counts


def _token_types(sentences: Sequence[tuple[list[str], list[str]]], n_tokens: int):
    """Type index of every token and the distinct (text, kind) types: ((N,) int32, list of U keys)."""
    return token_types(list(chain.from_iterable(s[0] for s in sentences)),
                       list(chain.from_iterable(s[1] for s in sentences)))


def token_types(texts: list[str], kinds: list[str]) -> tuple[np.ndarray, list[tuple[str, str]]]:
    """Type index of every token and the distinct (text, kind) types: ((N,) int32, list of U keys).

    This is the only per-token Python work, and it runs in C loops (dict.fromkeys, map). Texts and
    kinds are indexed separately because building and hashing a (text, kind) tuple per token costs
    several times more; the pair is rebuilt for distinct types only.
    """
    n_tokens = len(texts)
    if len(kinds) != n_tokens:
        raise DataError(f"{n_tokens} tokens but {len(kinds)} kinds")
    if n_tokens == 0:
        return np.zeros(0, dtype=_ID), []
    text_index = dict.fromkeys(texts)
    distinct_texts = list(text_index)
    text_index.update(zip(distinct_texts, range(len(distinct_texts))))
    kind_index = dict.fromkeys(kinds)
    distinct_kinds = list(kind_index)
    kind_index.update(zip(distinct_kinds, range(len(distinct_kinds))))
    text_id = np.fromiter(map(text_index.__getitem__, texts), dtype=_ID, count=n_tokens)
    if len(distinct_kinds) == 1:
        return text_id, [(text, distinct_kinds[0]) for text in distinct_texts]
    kind_id = np.fromiter(map(kind_index.__getitem__, kinds), dtype=_ID, count=n_tokens)
    pair_id = text_id * len(distinct_kinds) + kind_id
    distinct_pairs, token_type = np.unique(pair_id, return_inverse=True)
    n_kinds = len(distinct_kinds)
    keys = [(distinct_texts[pair // n_kinds], distinct_kinds[pair % n_kinds])
            for pair in distinct_pairs.tolist()]
    return token_type.astype(_ID, copy=False), keys


class _RowBuilder:
    """Builds CSR index arrays for batches under one feature-string -> id mapping.

    The cache holds, per token type (text, kind), one int32 array: K per-slot counts followed by the
    ids of all slots concatenated (slot 0 is the token itself, then the window offsets).
    """

    def __init__(self, spec: FeatureSpec, encoder, constant_id: Callable[[str], int],
                 cache_size: int):
        self.spec = spec
        self.encoder = encoder
        self.cache_size = max(1, int(cache_size))
        self.cache: dict[tuple[str, str], np.ndarray] = {}
        self.offsets = np.array(spec.offsets(), dtype=_ID)
        self._build_constants(constant_id)

    def _build_constants(self, constant_id: Callable[[str], int]) -> None:
        """Ids of the position features: bias, first, last, relative buckets, one boundary per offset."""
        names = ["bias", "pos=first", "pos=last"]
        names += [f"rel={b}" for b in range(self.spec.relative_buckets)]
        names += [_boundary_feature(int(o)) for o in self.offsets[1:]]
        self.constants = np.array([constant_id(name) for name in names], dtype=_ID)
        self.constant_known = (self.constants >= 0).astype(_ID)
        if not self.spec.first_last:
            self.constant_known[1:3] = 0
        self.rel_base = 3
        self.boundary_base = 3 + self.spec.relative_buckets

    def encode_new(self, keys: list[tuple[str, str]]) -> list[np.ndarray]:
        """Cache entries for new types, built together: one array, then one slice (view) per type."""
        raw: list[int] = []
        pair_counts = self.encoder.append_pairs(keys, raw)
        k, n_types = len(self.offsets), len(keys)
        pairs = np.array(raw, dtype=np.int64)                               # (R,)
        per_type = np.array(pair_counts, dtype=_ID)                         # (M,)
        type_of_pair = np.repeat(np.arange(n_types, dtype=_ID), per_type)
        sort_key = type_of_pair * k + (pairs >> _SLOT_SHIFT).astype(_ID)
        ids = (pairs & ((1 << _SLOT_SHIFT) - 1)).astype(_ID)
        order = np.argsort(sort_key, kind="stable")       # pairs grouped by type, then by slot
        slot_counts = np.bincount(sort_key, minlength=n_types * k).reshape(n_types, k)
        entry_lengths = k + per_type
        entry_end = np.cumsum(entry_lengths, dtype=_ID)
        entry_start = entry_end - entry_lengths
        out = np.empty(int(entry_end[-1]), dtype=_ID)
        out[(entry_start[:, None] + np.arange(k)).ravel()] = slot_counts.ravel()
        pair_start = np.cumsum(per_type, dtype=_ID) - per_type
        rank = np.arange(len(order), dtype=_ID) - pair_start[type_of_pair]   # type_of_pair is sorted
        out[entry_start[type_of_pair] + k + rank] = ids[order]
        return [out[a:b] for a, b in zip(entry_start.tolist(), entry_end.tolist())]

    def entries_for(self, keys: list[tuple[str, str]]) -> list[np.ndarray]:
        """Cache entries of the batch's distinct types, in order. Loops over distinct types only."""
        cache = self.cache
        entries = [cache.get(key) for key in keys]
        missing = [n for n, entry in enumerate(entries) if entry is None]
        if not missing:
            return entries
        new_keys = [keys[n] for n in missing]
        if len(cache) + len(new_keys) > self.cache_size:
            cache.clear()   # crude but O(1) amortised; the next batches refill what they use
        for n, key, entry in zip(missing, new_keys, self.encode_new(new_keys)):
            entries[n] = entry
            if len(cache) < self.cache_size and len(key[0]) <= _MAX_CACHED_CHARS:
                cache[key] = entry
        return entries

    def build(self, sentences: Sequence[tuple[list[str], list[str]]], first_number: int = 0):
        """-> indices (nnz,) int32, indptr (N+1,) int32, lengths (B,) int64 for the batch."""
        lengths = np.fromiter((len(texts) for texts, _ in sentences), dtype=np.int64,
                              count=len(sentences))
        for number, (texts, kinds) in enumerate(sentences):
            if len(texts) != len(kinds):
                raise DataError(f"sentence {first_number + number}: {len(texts)} tokens but "
                                f"{len(kinds)} kinds")
        n_tokens = int(lengths.sum())
        if n_tokens == 0:
            return np.zeros(0, _ID), np.zeros(1, _ID), lengths

        token_type, type_keys = _token_types(sentences, n_tokens)
        entries = self.entries_for(type_keys)

        # Flat source array: constants first, then every type's entry.
        k = len(self.offsets)
        entry_lengths = np.fromiter(map(len, entries), dtype=_ID, count=len(entries))
        n_const = len(self.constants)
        entry_base = n_const + np.cumsum(entry_lengths, dtype=_ID) - entry_lengths            # (U,)
        source = np.concatenate([self.constants, *entries])
        type_counts = source[entry_base[:, None] + np.arange(k)]                   # (U, K)
        type_starts = entry_base[:, None] + k + np.cumsum(type_counts, axis=1, dtype=_ID) - type_counts

        # Position of each token in its line.
        line_lengths = lengths.astype(_ID)
        line_start = np.repeat(np.cumsum(line_lengths, dtype=_ID) - line_lengths, line_lengths)  # (N,)
        line_length = np.repeat(line_lengths, line_lengths)
        position = np.arange(n_tokens, dtype=_ID) - line_start

        # Segments per row: bias, first, last, [relative], offset 0, window offsets.
        n_seg = 3 + (1 if self.spec.relative_buckets else 0) + k
        seg_start = np.zeros((n_tokens, n_seg), dtype=_ID)
        seg_count = np.zeros((n_tokens, n_seg), dtype=_ID)
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
        indptr = np.zeros(n_tokens + 1, dtype=_ID)
        np.cumsum(seg_count.sum(axis=1, dtype=_ID), out=indptr[1:])
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
        encoder = _VocabularyEncoder(self.spec, self.feature_id, self.cache_size)
        self._rows = _RowBuilder(self.spec, encoder, lambda name: self.feature_id.get(name, -1),
                                 self.cache_size)

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

        rows = _RowBuilder(self.spec, _CountingEncoder(self.spec, provisional), grow, self.cache_size)
        counts = np.zeros(0, dtype=np.int64)
        iterator = iter(sentences)
        done = 0
        while chunk := list(islice(iterator, chunk_size)):
            indices, _, _ = rows.build(chunk, first_number=done)
            done += len(chunk)
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


def _block_sums(weights: np.ndarray, n_slots: int, pair_lists: list[Pairs]) -> np.ndarray:
    """(M, K, L): for each list of (slot, id) pairs, the sum of weights[id] at row slot."""
    counts = np.fromiter(map(len, pair_lists), dtype=np.int64, count=len(pair_lists))
    pairs = np.fromiter(chain.from_iterable(pair_lists), dtype=np.int64, count=int(counts.sum()))
    segment = np.repeat(np.arange(len(pair_lists)) * n_slots, counts) + (pairs >> _SLOT_SHIFT)
    ids = pairs & ((1 << _SLOT_SHIFT) - 1)
    sums = np.zeros((len(pair_lists) * n_slots, weights.shape[1]))
    np.add.at(sums, segment, weights[ids])
    return sums.reshape(len(pair_lists), n_slots, weights.shape[1])


def _packed_affixes(codes: np.ndarray, anchors: np.ndarray, step: int, width: int, bits: int) -> np.ndarray:
    """(M, width) uint64: column n-1 packs the n code points read from each anchor in direction step
    (+1: a prefix from its first character, -1: a suffix read backwards from its last), ``bits`` bits
    each, the first one lowest. Entries past a token's end hold neighbours' code points (masked later).

    codes (C,) code points of the batch; anchors (M,) int64 positions in codes.
    """
    if width == 0 or codes.size == 0:
        return np.zeros((anchors.size, width), dtype=np.uint64)
    positions = np.clip(anchors[:, None] + step * np.arange(width), 0, codes.size - 1)
    chars = codes[positions].astype(np.uint64)
    chars <<= (bits * np.arange(width)).astype(np.uint64)
    return np.cumsum(chars, axis=1, dtype=np.uint64)


def _pack(value: str, bits: int) -> int:
    """The integer `_packed_affixes` makes of these code points, in this order, ``bits`` bits each."""
    return sum(ord(char) << (bits * i) for i, char in enumerate(value))


class _AffixTables:
    """Known prefix and suffix values -> store rows, searched for all of a batch's types at once.

    Each table is one affix length; its values are packed into integers (`_packed_affixes`, one per
    code point width in use), tagged with the table number in the top bits, and kept sorted in one
    array, so a batch's lookups are one searchsorted. Tables whose values would not fit the integer
    (long affixes of wide code points) fall back to one dict lookup per type.
    """

    def __init__(self, tables: list[tuple[int, bool, dict[str, int]]]):
        # A value of another length never fires (the extractor makes "p3=" only from 3 characters).
        self.tables = [(length, is_prefix, {value: row for value, row in rows.items() if len(value) == length})
                       for length, is_prefix, rows in tables]
        self.lengths = np.array([length for length, _, _ in self.tables], dtype=np.int64)     # (A,)
        self.is_prefix = np.array([is_prefix for _, is_prefix, _ in self.tables], dtype=np.bool_)
        self.tag_shift = 64 - max(len(self.tables), 1).bit_length()
        self._sorted: dict[int, tuple[np.ndarray, np.ndarray]] = {}
        self._hashed: dict[int, tuple[np.ndarray, np.ndarray, int]] = {}

    def packable(self, bits: int) -> int:
        """Longest affix whose code points of ``bits`` bits fit below the table tag."""
        return self.tag_shift // bits

    def sorted_keys(self, bits: int) -> tuple[np.ndarray, np.ndarray]:
        """(keys (V,) uint64 sorted, store rows (V,) int64) of all packable values of ``bits`` bits."""
        found = self._sorted.get(bits)
        if found is None:
            keys, rows = [], []
            for number, (length, is_prefix, values) in enumerate(self.tables):
                if length > self.packable(bits):
                    continue
                for value, row in values.items():
                    if max(map(ord, value)) < (1 << bits):
                        keys.append(_pack(value if is_prefix else value[::-1], bits) | (number << self.tag_shift))
                        rows.append(row)
            keys_array = np.array(keys, dtype=np.uint64).reshape(-1)
            order = np.argsort(keys_array, kind="stable")
            found = self._sorted[bits] = (keys_array[order], np.array(rows, dtype=np.int64).reshape(-1)[order])
        return found

    def hashed(self, bits: int) -> tuple[np.ndarray, np.ndarray, int]:
        """The packable values of ``bits`` bits as an open-addressing table for the compiled lookup:
        (keys (H,) uint64, store rows (H,), log2 H), H at least twice the values."""
        found = self._hashed.get(bits)
        if found is None:
            from streamtag.feature_kernels import EMPTY_KEY, hash_slot

            keys, rows = self.sorted_keys(bits)
            hash_bits = max(2 * keys.size, 2).bit_length()
            table_keys = np.full(1 << hash_bits, EMPTY_KEY, dtype=np.uint64)
            table_rows = np.zeros(1 << hash_bits, dtype=np.int64)
            for key, row in zip(keys.tolist(), rows.tolist()):
                slot = hash_slot(key, hash_bits)
                while table_keys[slot] != EMPTY_KEY:
                    slot = (slot + 1) & ((1 << hash_bits) - 1)
                table_keys[slot], table_rows[slot] = key, row
            found = self._hashed[bits] = (table_keys, table_rows, hash_bits)
        return found

    def rows(self, lowers: list[str], codes: np.ndarray, bits: int, lengths: np.ndarray) -> np.ndarray:
        """(M, A) store row of each type's value in each table (0: unknown, or the type is too short).

        lowers (M,) lower forms; codes: their code points joined by one separator each; lengths (M,).
        """
        starts = np.cumsum(lengths + 1) - lengths - 1
        kernels = _feature_kernels()
        if kernels is not None:
            rows = np.empty((len(lowers), len(self.tables)), dtype=np.int64)
            kernels.affix_rows(codes, starts, lengths, self.lengths, self.is_prefix, bits, self.tag_shift,
                       *self.hashed(bits), rows)
        else:
            rows = self.rows_numpy(codes, bits, lengths, starts)
        packable = self.packable(bits)
        for number, (length, is_prefix, values) in enumerate(self.tables):
            if length > packable:   # rare: wide code points, long affix: one dict lookup per type
                cut = slice(length) if is_prefix else slice(-length, None)
                found = np.fromiter(map(values.get, map(itemgetter(cut), lowers), repeat(0)), dtype=np.int64,
                                    count=len(lowers))
                rows[:, number] = np.where(lengths >= length, found, 0)
        return rows

    def rows_numpy(self, codes: np.ndarray, bits: int, lengths: np.ndarray, starts: np.ndarray) -> np.ndarray:
        """`rows` of the packable tables in numpy (0 for the others): the compiled lookup's reference."""
        n_types = lengths.size
        packable = self.packable(bits)
        widths = {is_prefix: min(packable, max((length for length, prefix, _ in self.tables if prefix == is_prefix),
                                               default=0)) for is_prefix in (True, False)}
        packed = {True: _packed_affixes(codes, starts, 1, widths[True], bits),
                  False: _packed_affixes(codes, starts + lengths - 1, -1, widths[False], bits)}
        query = np.zeros((n_types, len(self.tables)), dtype=np.uint64)                   # (M, A)
        for number, (length, is_prefix, _) in enumerate(self.tables):
            if length <= packable:
                query[:, number] = packed[is_prefix][:, length - 1] | np.uint64(number << self.tag_shift)
        keys, key_rows = self.sorted_keys(bits)
        if keys.size:
            at = np.minimum(np.searchsorted(keys, query), keys.size - 1)
            rows = np.where(keys[at] == query, key_rows[at], 0)
        else:
            rows = np.zeros(query.shape, dtype=np.int64)
        rows[(lengths[:, None] < self.lengths) | (self.lengths > packable)] = 0
        return rows


def _feature_kernels():
    """The compiled kernels of the scorer (`feature_kernels.Kernels`), or None for the numpy code and
    dict lookups (see `crf.compiled`)."""
    from streamtag import crf

    return crf.compiled("load", module="feature_kernels")
# Marks a non-ASCII type's shape key: its shape block lacks the case flags an ASCII shape's block holds,
# and no ASCII shape contains this character, so the two kinds of keys never meet.
_NON_ASCII_MARK = "\uffff"
# Joins a batch's texts so that translate, lower and encode run once for all of them.
_JOIN = "\x00"
# bytes.translate table of the word shape of every ASCII character (the rest map to themselves).
_ASCII_SHAPES = bytes(ord(word_shape(chr(code))) if code < 128 else code for code in range(256))


class _TypeScorer:
    """(K, L) score blocks of many new types at once: per slot, the sum of W's rows over the type's
    known feature ids, exactly the ids `_VocabularyEncoder.append_pairs` gives.

    New types arrive a few per log line (timestamps, ids, addresses), so this is a hot path of
    decoding. A type's block is the sum of a few blocks kept in one store (`blocks`, (R, K*L), row 0
    zero), one per part of its features:
    - its lower form and the word lists holding it: blocks made up front for every lower form that has
      any (every known lower value, every listed word); any other form has none (a form longer than the
      value cut has its cut value's block);
    - each prefix and suffix: blocks made up front for every known value, found for all types of a
      batch at once by searching their code points packed into integers (`_AffixTables`);
    - its shape value and its collapsed shape value: blocks made up front for every known one;
    - the rest of its shape features with its kind (kind, length bucket, shape flags and, for ASCII
      texts, the case flags, which for ASCII follow from the shape: X upper, x lower, the rest
      uncased): one block per (signature, kind), made when first met. Shapes with one signature
      (`_shape_signatures`) share those features: hosts of every name length, ids of every hex digit
      pattern. Non-ASCII texts test the case flags one by one (they are rare).
    Shapes are kept by id (a dict lookup per type), with their value rows and signature; new ones are
    registered for a whole batch at once. Per batch that is a few C-level passes over the new types
    (join, translate, lower, split, a dict lookup for the shape and one for the lower form), a fixed
    number of numpy calls, and two compiled kernels (`feature_kernels`: the affix lookup and the sum;
    numpy does the same without them, the sum in the same order).
    """

    def __init__(self, encoder: _VocabularyEncoder, weights: np.ndarray, n_slots: int, limit: int):
        spec, index, use = encoder.spec, encoder.index, encoder.use
        self.spec, self.use = spec, use
        self.weights, self.n_slots = weights, n_slots
        self.width = n_slots * weights.shape[1]
        self.cut = spec.max_value_chars
        self.use_lower = use["lower"]
        self.limit = max(1, limit)
        self.shape_flags = encoder.shape_flags
        self.known = lambda names: tuple(chain.from_iterable(filter(None, map(index.get, names))))
        known = self.known

        pair_lists: list[Pairs] = []

        def fixed_rows(keys, pairs_of) -> dict:
            """key -> store row of the keys that have any known pair (the others have none)."""
            rows = {}
            for key in keys:
                pairs = pairs_of(key)
                if pairs:
                    pair_lists.append(pairs)
                    rows[key] = len(pair_lists)
            return rows

        wordlists = spec.wordlists if use["wordlists"] else ()
        lower_label = "lower=" if self.use_lower else None

        def word_pairs(lower: str) -> Pairs:
            names = [lower_label + lower[: self.cut]] if lower_label else []
            return known(names + ["list=" + name for name, words in wordlists if lower in words])

        def values(label: str) -> list[str]:
            return sorted(name[len(label):] for name in index if name.startswith(label))

        listed = set().union(*(words for _, words in wordlists))
        known_lowers = set(values("lower="))
        self.word_rows = fixed_rows(sorted(known_lowers | listed), word_pairs)
        # A lower form longer than the cut that is in no list has only its cut value's block.
        self.cut_rows = fixed_rows(sorted(known_lowers), lambda value: known(["lower=" + value]))
        self.shape_value_rows = fixed_rows(values("shape=") if use["shape"] else [],
                                           lambda value: index["shape=" + value])
        self.collapsed_value_rows = fixed_rows(values("cshape=") if use["collapsed_shape"] else [],
                                               lambda value: index["cshape=" + value])
        tables = []
        for lengths, labels, is_prefix in ((spec.prefix_lengths, encoder.prefix_labels, True),
                                           (spec.suffix_lengths, encoder.suffix_labels, False)):
            for length, label in zip(lengths, labels):
                rows = fixed_rows(values(label), lambda value: index[label + value])
                if rows:
                    tables.append((length, is_prefix, rows))
        self.affixes = _AffixTables(tables) if tables else None

        self.text_flags = [(name, holds) for name, holds in encoder.text_flags if "flag=" + name in index]
        flag_rows = fixed_rows([name for name, _ in self.text_flags], lambda name: index["flag=" + name])
        self.flag_rows = [(holds, flag_rows[name]) for name, holds in self.text_flags]

        self.blocks = np.zeros((len(pair_lists) + 64, self.width))            # (R, K*L), row 0 zero
        self.slot_masks = np.zeros(self.blocks.shape[0], dtype=np.int64)     # (R,) slots that may be non-zero
        self.n_blocks = 1
        self._store(pair_lists)
        self.n_fixed = self.n_blocks
        # Per shape id: its value rows and its signature; per (signature, kind): its block row (-1: not yet).
        self.value_of = np.zeros(64, dtype=np.int64)
        self.collapsed_of = np.zeros(64, dtype=np.int64)
        self.signature_of = np.zeros(64, dtype=np.int64)
        self.class_of = np.full((64, 4), -1, dtype=np.int64)
        self._reset_shapes()
        self.length_bounds = np.asarray(spec.length_bounds if use["length"] else (), dtype=np.int64)   # (B,)
        self._lookups: _TypeIndex | None = None       # the compiled value lookups, made on first use
        self.lookup_values = np.zeros(1, dtype=np.int64)

    def _reset_shapes(self) -> None:
        """Forget the cached shape blocks (bounded: they refill with the shapes in use)."""
        self.shape_ids: dict[str, int] = {}           # shape (marked if non-ASCII) -> shape id
        self.n_shapes = 0
        self.signature_ids: dict[int, int] = {}      # signature code -> signature id
        self.signature_shapes: list[tuple[str, bool]] = []   # signature id -> (a shape of it, ASCII?)
        self.n_blocks = self.n_fixed
        self.class_of[:] = -1

    # -- a batch of new types --

    def scores(self, texts: Sequence[str], kind_ids: np.ndarray, kind_names: list[str], out: np.ndarray,
               encoded: tuple[np.ndarray, np.ndarray, np.ndarray] | None = None) -> None:
        """Write the (M, K, L) score blocks of the M types (texts[m], kind_names[kind_ids[m]]) into out.

        ``encoded``: the texts as the caller has them, (items (D,), starts (M,), ends (M,)), the items
        code points (uint32) or UTF-8 bytes (uint8); texts[m] is then read only if type m is not ASCII
        (or to name a new shape signature)."""
        n_types = len(texts)
        if n_types == 0:
            return
        if self.n_shapes + len(self.signature_shapes) + n_types > self.limit:
            self._reset_shapes()
        flat = out.reshape(n_types, self.width)
        kernels = _feature_kernels()
        if kernels is not None:
            rows = self._compiled_rows(texts, kind_ids, kind_names, encoded, kernels)
            kernels.sum_block_rows(self.blocks, self.slot_masks, rows, self.weights.shape[1], flat)
            return
        joined = _JOIN.join(texts)
        holds_separator = joined.count(_JOIN) != n_types - 1
        if joined.isascii() and not holds_separator:
            shapes, lowers, codes = _ascii_forms(joined)
            rows = self._part_rows(shapes, lowers, kind_ids, kind_names, [(codes, 7, n_types)], False)
        else:
            rows = self._mixed_rows(texts, kind_ids, kind_names, holds_separator)
        self._sum_numpy(rows, flat)

    def _compiled_rows(self, texts: Sequence[str], kind_ids: np.ndarray, kind_names: list[str],
                       encoded: tuple[np.ndarray, np.ndarray, np.ndarray] | None, kernels) -> np.ndarray:
        """(M, P) store rows, as `_part_rows` / `_mixed_rows` give them: the ASCII types' parts found
        by one compiled pass over their bytes (shape, collapsed shape and signature, lower form, value
        lookups, affixes: the Python and numpy passes cost several times more), the others' the
        Python way."""
        n_types = len(texts)
        data, starts, ends = encoded if encoded is not None else _joined_bytes(texts, kernels.split_at_nul)
        affixes = self.affixes
        if affixes is not None:
            table_lengths, table_is_prefix, tag_shift = affixes.lengths, affixes.is_prefix, affixes.tag_shift
            affix_keys, affix_values, affix_hash_bits = affixes.hashed(7)
        else:
            table_lengths, table_is_prefix, tag_shift = _NO_TABLES
            affix_keys, affix_values, affix_hash_bits = _NO_AFFIX_HASH
        rows = np.empty((n_types, _COLUMN_AFFIXES + self.use_lower + table_lengths.size), dtype=np.int64)
        signatures = np.empty(n_types, dtype=np.int64)
        lookups = self._lookup_index(kernels)
        others = kernels.ascii_part_rows(
            data, starts, ends, _ASCII_SHAPE_CODES, _CHAR_BITS, _SIGNATURE_FLAG_BITS, _UPPER_BIT, _LOWER_BIT,
            self.length_bounds, self.cut, self.use_lower, lookups.slots, lookups.hash_bits, lookups.arena,
            self.lookup_values, _LOOKUP_TAGS, table_lengths, table_is_prefix, tag_shift, affix_keys, affix_values,
            affix_hash_bits, rows, signatures)
        plain = np.flatnonzero(signatures >= 0) if others else None
        if others < n_types:
            picked = slice(None) if plain is None else plain
            fast_kinds = kind_ids[picked]
            plain_texts = texts if plain is None else _TextsAt(texts, plain)
            signature_ids = self._signature_ids(signatures[picked], plain_texts)
            rows[picked, 2] = self._class_rows(signature_ids, fast_kinds, kind_names)
            if affixes is not None and affixes.packable(7) < int(table_lengths.max()):
                self._unpackable_affixes(rows, picked, plain_texts)
        if not others:
            return rows
        rest = np.flatnonzero(signatures < 0)
        rest_rows = self._mixed_rows([texts[m] for m in rest.tolist()], kind_ids[rest], kind_names, True)
        full = np.zeros((n_types, rest_rows.shape[1]), dtype=np.int64)
        full[:, : rows.shape[1]] = rows
        full[rest] = rest_rows
        return full

    def _unpackable_affixes(self, rows: np.ndarray, picked, texts: Sequence[str]) -> None:
        """Fill the affix columns of the tables too long to pack 7-bit code points (one dict lookup per
        type: never with the default spec)."""
        lowers = [text.lower() for text in texts]
        lengths = np.fromiter(map(len, lowers), dtype=np.int64, count=len(lowers))
        first = rows.shape[1] - len(self.affixes.tables)
        packable = self.affixes.packable(7)
        for number, (length, is_prefix, values) in enumerate(self.affixes.tables):
            if length > packable:
                cut = slice(length) if is_prefix else slice(-length, None)
                found = np.fromiter(map(values.get, map(itemgetter(cut), lowers), repeat(0)), dtype=np.int64,
                                    count=len(lowers))
                rows[picked, first + number] = np.where(lengths >= length, found, 0)

    def _lookup_index(self, kernels) -> _TypeIndex:
        """The compiled index of the value blocks (`feature_kernels.LOOKUP_*`), made on first use."""
        if self._lookups is None:
            keys, tags, values = [], [], [0]
            for tag, rows in ((LOOKUP_WORD, self.word_rows), (LOOKUP_CUT, self.cut_rows if self.use_lower else {}),
                              (LOOKUP_SHAPE, self.shape_value_rows), (LOOKUP_COLLAPSED, self.collapsed_value_rows)):
                keys += rows
                tags += [tag] * len(rows)
                values += rows.values()
            index = _TypeIndex.sized(None, len(keys) + 1, 0, 0)
            if keys:
                data, starts, ends = _joined_bytes(keys, kernels.split_at_nul)
                tag_starts = np.array(tags, dtype=np.int64)
                placed, firsts = np.empty(len(keys), dtype=np.int64), np.empty(len(keys), dtype=np.int64)
                index.arena = np.zeros(data.size + len(keys), dtype=np.uint8)
                found = kernels.place_types(data, starts, ends, _LOOKUP_TAGS, tag_starts, tag_starts + 1, index.slots,
                                            index.hash_bits, index.arena, index.state, index.limit, 1 << 62, placed,
                                            firsts)
                assert found == len(keys), "lookup keys are distinct"
            self.lookup_values = np.array(values, dtype=np.int64)    # by index row: rows 1.. in key order
            self._lookups = index
        return self._lookups

    def _sum_numpy(self, rows: np.ndarray, flat: np.ndarray) -> None:
        """The kernel's sums in numpy, in its order (so equal bit for bit): rows (M, P) -> flat (M, K*L)."""
        flat[:] = 0.0
        for column in rows.T:
            hits = np.flatnonzero(column)
            flat[hits] += self.blocks[column[hits]]

    def _mixed_rows(self, texts: list[str], kind_ids: np.ndarray, kind_names: list[str],
                    holds_separator: bool) -> np.ndarray:
        """(M, P) store rows of types some of which are not ASCII or hold the separator (NUL: then
        ``holds_separator``): the other ones still go the fast way, these one text at a time."""
        n_types = len(texts)
        fast = np.fromiter(map(str.isascii, texts), dtype=bool, count=n_types)
        if holds_separator:
            fast &= ~np.fromiter(map(contains, texts, repeat(_JOIN)), dtype=bool, count=n_types)
        fast_types, slow_types = np.flatnonzero(fast), np.flatnonzero(~fast)
        slow_texts = _pick(texts, slow_types.tolist())
        shapes, lowers, codes = _ascii_forms(_JOIN.join(_pick(texts, fast_types.tolist()))) \
            if fast_types.size else ([], [], np.zeros(0, dtype=np.uint8))
        segments = [(codes, 7, fast_types.size)]
        slow_shapes = list(map(str.translate, slow_texts, repeat(_SHAPE_TABLE)))
        # lower() per text: for non-ASCII text it can depend on the neighbouring characters (final sigma).
        slow_lowers = list(map(str.lower, slow_texts))
        slow_codes = np.frombuffer(_JOIN.join(slow_lowers).encode("utf-32-le", "surrogatepass"), dtype=np.uint32)
        segments.append((slow_codes, max(int(slow_codes.max()).bit_length(), 1) if slow_codes.size else 1,
                         slow_types.size))
        non_ascii = np.flatnonzero(~np.fromiter(map(str.isascii, slow_texts), dtype=bool,
                                                count=len(slow_texts))).tolist()
        for n in non_ascii:
            slow_shapes[n] += _NON_ASCII_MARK
        order = np.concatenate([fast_types, slow_types])
        part = self._part_rows(shapes + slow_shapes, lowers + slow_lowers, kind_ids[order], kind_names, segments,
                               bool(non_ascii))
        rows = np.zeros((n_types, part.shape[1] + len(self.flag_rows)), dtype=np.int64)
        rows[order, : part.shape[1]] = part
        for column, (holds, row) in enumerate(self.flag_rows, start=part.shape[1]):
            rows[slow_types[[n for n in non_ascii if holds(slow_texts[n])]], column] = row
        return rows

    def _part_rows(self, shapes: list[str], lowers: list[str], kind_ids: np.ndarray, kind_names: list[str],
                   segments: list[tuple[np.ndarray, int, int]], marked: bool) -> np.ndarray:
        """(M, P) store rows: shape value, collapsed shape value, shape rest, lower form, long lower form,
        affixes. ``segments``: consecutive runs of types as (code points of their lower forms joined by
        one separator each, bits per code point, number of types)."""
        n_types = len(shapes)
        columns = self._shape_rows(shapes, kind_ids, kind_names, marked)
        word = np.fromiter(map(self.word_rows.get, lowers, repeat(0)), dtype=np.int64, count=n_types)
        columns.append(word)
        lengths = np.fromiter(map(len, lowers), dtype=np.int64, count=n_types)
        if self.use_lower:
            long_forms = np.flatnonzero((lengths > self.cut) & (word == 0)).tolist()
            column = np.zeros(n_types, dtype=np.int64)
            if long_forms:
                cut_rows, cut = self.cut_rows, self.cut
                column[long_forms] = [cut_rows.get(lowers[n][:cut], 0) for n in long_forms]
            columns.append(column)
        rows = np.stack(columns, axis=1)
        if self.affixes is not None:
            affixes, first = [], 0
            for codes, bits, count in segments:
                if count:
                    affixes.append(self.affixes.rows(lowers[first : first + count], codes, bits,
                                                     lengths[first : first + count]))
                first += count
            rows = np.concatenate([rows] + affixes, axis=1) if len(affixes) == 1 else \
                np.concatenate([rows, np.concatenate(affixes)], axis=1)
        return rows

    def _shape_rows(self, shapes: list[str], kind_ids: np.ndarray, kind_names: list[str],
                    marked: bool) -> list[np.ndarray]:
        """(M,) store rows of each type's shape value, collapsed shape value, and the rest of its shape
        features with its kind (kind, length, flags: `_add_shapes`). ``marked``: some shapes may carry
        the non-ASCII mark."""
        n_types = len(shapes)
        shape_ids = self.shape_ids
        ids = np.fromiter(map(shape_ids.get, shapes, repeat(-1)), dtype=np.int64, count=n_types)
        new = np.flatnonzero(ids < 0)
        if new.size:
            new_shapes = [shapes[n] for n in new.tolist()]
            self._add_shapes(list(dict.fromkeys(new_shapes)), marked)
            ids[new] = np.fromiter(map(shape_ids.__getitem__, new_shapes), dtype=np.int64, count=new.size)
        return [self.value_of[ids], self.collapsed_of[ids], self._class_rows(self.signature_of[ids], kind_ids, kind_names)]

    def _class_rows(self, signatures: np.ndarray, kind_ids: np.ndarray, kind_names: list[str]) -> np.ndarray:
        """(M,) store rows of the rest of the shape features with the kind, by signature id and kind id
        (M,), making the blocks of pairs not met before."""
        if len(kind_names) > self.class_of.shape[1]:
            self.class_of = _grown_to(self.class_of, self.class_of.shape[0], len(kind_names), -1)
        rest = self.class_of[signatures, kind_ids]
        missing = np.flatnonzero(rest < 0)
        if missing.size:
            n_kinds = self.class_of.shape[1]
            pairs = np.unique(signatures[missing] * n_kinds + kind_ids[missing])
            self._add_classes(pairs // n_kinds, pairs % n_kinds, kind_names)
            rest[missing] = self.class_of[signatures[missing], kind_ids[missing]]
        return rest

    def _signature_ids(self, codes: np.ndarray, texts: Sequence[str]) -> np.ndarray:
        """(M,) signature id of ASCII texts (M,) of signature codes (M,) (`_shape_signatures`),
        numbering codes not met before (their first text's shape stands for them)."""
        distinct, first_of, signature_of_text = np.unique(codes, return_index=True, return_inverse=True)
        numbers = self._signature_numbers(distinct, first_of, lambda n: word_shape(texts[n]), lambda n: True)
        return numbers[signature_of_text.reshape(-1)]

    def _signature_numbers(self, distinct: np.ndarray, first_of: np.ndarray, shape_of, is_ascii_of) -> np.ndarray:
        """Signature ids of distinct signature codes, numbering new ones with the shape (and ASCII-ness)
        of their first holder ``first_of``."""
        numbers = []
        for code, n in zip(distinct.tolist(), first_of.tolist()):     # a handful per batch
            number = self.signature_ids.get(code)
            if number is None:
                number = self.signature_ids[code] = len(self.signature_shapes)
                self.signature_shapes.append((shape_of(n), is_ascii_of(n)))   # any shape of it will do
            numbers.append(number)
        if len(self.signature_shapes) > self.class_of.shape[0]:
            self.class_of = _grown_to(self.class_of, 2 * len(self.signature_shapes), self.class_of.shape[1], -1)
        return np.array(numbers, dtype=np.int64)

    def _add_shapes(self, new_shapes: list[str], marked: bool) -> None:
        """Register distinct new shapes: their value rows and their signatures (`_shape_signatures`)."""
        first = self.n_shapes
        self.n_shapes += len(new_shapes)
        self.shape_ids.update(zip(new_shapes, range(first, self.n_shapes)))
        if self.n_shapes > self.value_of.size:
            size = 2 * self.n_shapes
            self.value_of, self.collapsed_of, self.signature_of = (
                _grown_to(array, size, None, 0) for array in (self.value_of, self.collapsed_of, self.signature_of))
        if marked:
            is_ascii = ~np.fromiter(map(str.endswith, new_shapes, repeat(_NON_ASCII_MARK)), dtype=bool,
                                    count=len(new_shapes))
            bare = [shape.removesuffix(_NON_ASCII_MARK) for shape in new_shapes]
        else:
            is_ascii, bare = np.ones(len(new_shapes), dtype=bool), new_shapes
        head = itemgetter(slice(self.cut))
        if self.shape_value_rows:
            self.value_of[first : self.n_shapes] = np.fromiter(
                map(self.shape_value_rows.get, map(head, bare), repeat(0)), dtype=np.int64, count=len(bare))
        if self.collapsed_value_rows:
            self.collapsed_of[first : self.n_shapes] = np.fromiter(
                map(self.collapsed_value_rows.get, map(head, _collapsed(bare)), repeat(0)), dtype=np.int64,
                count=len(bare))
        codes = _shape_signatures(bare, is_ascii, self.spec.length_bounds if self.use["length"] else ())
        distinct, first_of, signature_of_shape = np.unique(codes, return_index=True, return_inverse=True)
        numbers = self._signature_numbers(distinct, first_of, bare.__getitem__, lambda n: bool(is_ascii[n]))
        self.signature_of[first : self.n_shapes] = numbers[signature_of_shape.reshape(-1)]

    def _add_classes(self, signatures: np.ndarray, kind_ids: np.ndarray, kind_names: list[str]) -> None:
        """Store the blocks of new (signature, kind) pairs: kind, length bucket, shape and case flags."""
        spec, use = self.spec, self.use
        pair_lists = []
        for signature, kind_id in zip(signatures.tolist(), kind_ids.tolist()):
            shape, is_ascii = self.signature_shapes[signature]    # any shape of the signature will do
            names = ["kind=" + kind_names[kind_id]] if use["kind"] else []
            if use["length"]:
                names.append(_length_feature(len(shape), spec.length_bounds))
            names += ["flag=" + name for name, holds in self.shape_flags if holds(shape)]
            if is_ascii:
                stand_in = shape.replace("d", "0")    # same case classes as any ASCII text of this shape
                names += ["flag=" + name for name, holds in self.text_flags if holds(stand_in)]
            pair_lists.append(self.known(names))
        scored = [pairs for pairs in pair_lists if pairs]
        first = self._store(scored)
        rows = np.zeros(len(pair_lists), dtype=np.int64)
        rows[[bool(pairs) for pairs in pair_lists]] = np.arange(first, first + len(scored))
        self.class_of[signatures, kind_ids] = rows

    def _store(self, pair_lists: list[Pairs]) -> int:
        """Append the blocks of these (slot, id) pair lists to the store; the row of the first."""
        first, needed = self.n_blocks, self.n_blocks + len(pair_lists)
        if needed > self.blocks.shape[0]:
            # Little at a time: what grows is the cached part, a few hundred blocks beside thousands fixed.
            self.blocks = _grown_to(self.blocks, needed + 1024, None, 0.0)
            self.slot_masks = _grown_to(self.slot_masks, needed + 1024, None, 0)
        if pair_lists:
            blocks = _block_sums(self.weights, self.n_slots, pair_lists)           # (U, K, L)
            self.blocks[first:needed] = blocks.reshape(len(pair_lists), self.width)
            filled = (blocks != 0).any(axis=2)                                       # (U, K)
            if self.n_slots < 63:
                self.slot_masks[first:needed] = filled @ (1 << np.arange(self.n_slots, dtype=np.int64))
            else:
                self.slot_masks[first:needed] = -1
        self.n_blocks = needed
        return first


def _ascii_forms(joined: str) -> tuple[list[str], list[str], np.ndarray]:
    """Word shapes, lower forms and the lower forms' bytes (separators kept) of ASCII texts joined by the
    separator (which they do not hold): one C-level pass each instead of one call per text."""
    data = joined.encode("ascii")
    lower_data = data.lower()
    return (data.translate(_ASCII_SHAPES).decode("ascii").split(_JOIN), lower_data.decode("ascii").split(_JOIN),
            np.frombuffer(lower_data, dtype=np.uint8))


# The characters the shape flags test for (SHAPE_FLAGS); any other character counts as one class more.
_FLAG_CHARS = "dXx-._/:@="
_OTHER_CHAR = 1 << len(_FLAG_CHARS)
_CHAR_BITS = np.array([1 << _FLAG_CHARS.index(chr(code)) if chr(code) in _FLAG_CHARS else _OTHER_CHAR
                       for code in range(128)] + [_OTHER_CHAR], dtype=np.int64)      # (129,), 128: non-ASCII


# The compiled part rows' constants: the bits `_shape_signatures` packs, the ASCII shape of each byte,
# the tags of the value lookups, the empty affix tables.
_SIGNATURE_FLAG_BITS = len(_FLAG_CHARS) + 1
_UPPER_BIT, _LOWER_BIT = 1 << _FLAG_CHARS.index("X"), 1 << _FLAG_CHARS.index("x")
_ASCII_SHAPE_CODES = np.frombuffer(_ASCII_SHAPES, dtype=np.uint8).copy()                 # (256,)
LOOKUP_WORD, LOOKUP_CUT, LOOKUP_SHAPE, LOOKUP_COLLAPSED = 0, 1, 2, 3     # == feature_kernels.LOOKUP_*
_LOOKUP_TAGS = np.frombuffer(bytes(range(4)), dtype=np.uint8)          # read-only, as the texts' bytes
_COLUMN_AFFIXES = 4        # part row columns before the cut lower form and the affixes (see _part_rows)
_NO_TABLES = (np.zeros(0, dtype=np.int64), np.zeros(0, dtype=np.bool_), 60)
_NO_AFFIX_HASH = (np.full(2, np.uint64(0xFFFFFFFFFFFFFFFF)), np.zeros(2, dtype=np.int64), 1)


def _shape_signatures(shapes: list[str], is_ascii: np.ndarray, length_bounds: Sequence[int]) -> np.ndarray:
    """(U,) int64 signature code of each shape: shapes with one code have the same shape flags, length
    bucket and, if ASCII, case flags.

    The code packs the set of flag characters present (and whether any other is: `all_digit` needs
    it), whether the first is "X" (`initial_upper`), whether the shape is ASCII, the length bucket
    and, for ASCII, str.istitle of the shape with digits as "0" (the case flags of an ASCII text follow
    from its shape: X upper, x lower, the rest uncased; upper and lower need only the set, title also
    the order: no cased character before an "X", one before each "x", and at least one cased).
    """
    lengths = np.fromiter(map(len, shapes), dtype=np.int64, count=len(shapes))
    codes = np.frombuffer("".join(shapes).encode("utf-32-le", "surrogatepass"), dtype=np.uint32)
    signatures = np.zeros(len(shapes), dtype=np.int64)
    nonempty = np.flatnonzero(lengths)
    if nonempty.size:
        starts = (np.cumsum(lengths) - lengths)[nonempty]
        present = np.bitwise_or.reduceat(_CHAR_BITS[np.minimum(codes, 128)], starts)
        upper, lower = codes == ord("X"), codes == ord("x")
        cased_before = np.zeros(codes.size, dtype=bool)
        cased_before[1:] = upper[:-1] | lower[:-1]
        cased_before[starts] = False
        broken = np.logical_or.reduceat((upper & cased_before) | (lower & ~cased_before), starts)
        cased = (present & ((1 << _FLAG_CHARS.index("X")) | (1 << _FLAG_CHARS.index("x")))) != 0
        title = cased & ~broken & is_ascii[nonempty]
        flags_bits = len(_FLAG_CHARS) + 1
        signatures[nonempty] = present | (upper[starts].astype(np.int64) << flags_bits) | \
            (title.astype(np.int64) << (flags_bits + 1))
    buckets = np.searchsorted(np.asarray(length_bounds, dtype=np.int64), lengths)   # first bound >= length
    return signatures | (is_ascii.astype(np.int64) << (len(_FLAG_CHARS) + 3)) | (buckets << (len(_FLAG_CHARS) + 4))


def _grown_to(array: np.ndarray, rows: int, columns: int | None, fill) -> np.ndarray:
    """A copy of ``array`` with at least ``rows`` rows (and ``columns`` columns), the new cells ``fill``."""
    shape = (max(rows, array.shape[0]),) + (() if columns is None else (max(columns, array.shape[1]),))
    if array.ndim == 2 and columns is None:
        shape += array.shape[1:]
    grown = np.full(shape, fill, dtype=array.dtype)
    grown[tuple(slice(0, size) for size in array.shape)] = array
    return grown


def _collapsed(shapes: list[str]) -> list[str]:
    """[collapse_runs(shape) for shape in shapes], one numpy pass over their joined code points."""
    joined = _JOIN.join(shapes)
    if joined.count(_JOIN) != len(shapes) - 1:     # a shape holds the separator (a NUL character)
        return list(map(collapse_runs, shapes))
    codes = np.frombuffer(joined.encode("utf-32-le", "surrogatepass"), dtype=np.uint32)
    keep = np.ones(codes.size, dtype=bool)
    np.not_equal(codes[1:], codes[:-1], out=keep[1:])
    keep |= codes == ord(_JOIN)                     # empty shapes keep their separators
    return codes[keep].tobytes().decode("utf-32-le", "surrogatepass").split(_JOIN)


_NO_KIND = object()   # the kind of table rows that hold no type: unequal to any kind a token has

# Key items (code points) the compiled type index keeps per row it can hold, to begin with (a key is a
# text's code points and its kind id: about a dozen in logs; the index grows when a batch needs more).
_KEY_ITEMS_PER_ROW = 24


@dataclass
class _TypeIndex:
    """The compiled type index's arrays (see `feature_kernels.place_types`): (text, kind) -> table row."""

    slots: np.ndarray       # (H, 4) int64, H = 2**hash_bits >= 2 * limit
    hash_bits: int
    arena: np.ndarray       # (A,) kept keys' items (uint32 code points; uint8 bytes for value lookups)
    state: np.ndarray       # (2,) int64: rows in use (the boundary row 0 counted), arena items in use
    limit: int              # rows stay below this

    @classmethod
    def sized(cls, old: _TypeIndex | None, rows: int, key_bytes: int, tokens: int) -> _TypeIndex:
        """An empty index for ``rows`` rows (or ``tokens`` + 1 if more) and ``key_bytes`` key bytes at
        least, reusing ``old``'s memory where it is big enough."""
        limit = max(rows, tokens + 1)
        hash_bits = max(2 * limit - 1, 1).bit_length()
        if old is not None and old.hash_bits >= hash_bits:
            old.slots[:, 1] = 0                                 # row 0: an empty slot
            slots, hash_bits = old.slots, old.hash_bits
        else:
            slots = np.zeros((1 << hash_bits, 4), dtype=np.int64)
        arena_size = max(limit * _KEY_ITEMS_PER_ROW, key_bytes)
        arena = old.arena if old is not None and old.arena.size >= arena_size else np.zeros(arena_size, np.uint32)
        return cls(slots, hash_bits, arena, np.array([1, 0], dtype=np.int64), limit)


def _joined_bytes(texts: Sequence[str], split_at_nul) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """texts in UTF-8 (surrogates kept: the bytes stand for the str exactly), as (bytes (D,) uint8,
    starts (N,), ends (N,)): joined by NUL and cut by the compiled splitter, or, when a text holds a
    NUL (rare), encoded one by one."""
    n = len(texts)
    data = np.frombuffer(_JOIN.join(texts).encode("utf-8", "surrogatepass"), dtype=np.uint8)
    starts, ends = np.empty(n, dtype=np.int64), np.empty(n, dtype=np.int64)
    if split_at_nul(data, starts, ends) == n:
        return data, starts, ends
    encoded = [text.encode("utf-8", "surrogatepass") for text in texts]
    ends = np.cumsum(np.fromiter(map(len, encoded), dtype=np.int64, count=n))
    starts = ends - np.fromiter(map(len, encoded), dtype=np.int64, count=n)
    return np.frombuffer(b"".join(encoded), dtype=np.uint8), starts, ends


def _pick(items: Sequence, picked: list[int]) -> Sequence:
    """items[i] for i in picked, as a tuple made in C (a list comprehension costs about twice as much)."""
    if len(picked) == 1:
        return (items[picked[0]],)
    return itemgetter(*picked)(items) if picked else ()


class _TextsAt(Sequence):
    """source[at[m]] for m in range(len(at)): a few texts of a batch, made into str only when read."""

    __slots__ = ("source", "at")

    def __init__(self, source: Sequence[str], at: np.ndarray):
        self.source, self.at = source, at

    def __len__(self) -> int:
        return len(self.at)

    def __getitem__(self, m):
        if isinstance(m, slice):
            return [self.source[i] for i in self.at[m].tolist()]
        return self.source[int(self.at[m])]


def _picked(texts: Sequence[str], kinds: Sequence[str], picked) -> tuple[Sequence[str], Sequence[str]]:
    """The texts and kinds of the tokens ``picked`` (an int array, or a slice for all). A tokenizer's
    lazy texts and kinds (`tokenize.TokenTexts`, `TokenKinds`) make only these str."""
    if hasattr(texts, "pick") and hasattr(kinds, "pick"):
        return texts.pick(picked), kinds.pick(picked)
    if isinstance(picked, slice):
        return texts, kinds
    chosen = picked.tolist()
    return _pick(texts, chosen), _pick(kinds, chosen)


def _emission_kernel():
    """The compiled emission kernel (`feature_kernels.sum_emissions`), or None for the numpy code."""
    kernels = _feature_kernels()
    return None if kernels is None else kernels.sum_emissions


class EmissionScorer:
    """Emission scores E = X @ W of a batch, without building X: the decoding fast path.

    A token's feature row (see `_RowBuilder.build`) is the union of the position constants (bias,
    first, last, relative bucket), its own type's slot-0 features and, for each window offset, the
    neighbour type's features at that slot (or the offset's boundary feature). Its row of X @ W is
    therefore a sum of a few score vectors, each the sum of W's rows over one cached id list. Those
    sums are computed once per distinct (text, kind) type and kept in a table, so a batch costs one
    gather of (N, L) per slot instead of a sparse product over ~70 features per token.

    The table is bounded by ``cache_size`` types and starts afresh when full (between batches, so
    memory stays flat); the result equals ``extractor.transform(...)[0] @ weights`` up to rounding
    (a test checks 1e-9).
    """

    # Row 0 of every slot's table is the boundary row (no neighbour at that offset); types start at 1.
    _BOUNDARY = 0

    def __init__(self, extractor: FeatureExtractor, weights: np.ndarray, cache_size: int = 100_000):
        weights = np.ascontiguousarray(weights, dtype=np.float64)
        if weights.ndim != 2 or weights.shape[0] != extractor.n_features:
            raise ValueError(f"weights must be ({extractor.n_features}, L), got {weights.shape}")
        self.spec = extractor.spec
        self.rows = extractor._rows
        self.weights = weights
        self.cache_size = max(1, int(cache_size))
        self.n_slots = len(self.rows.offsets)
        self.n_labels = weights.shape[1]
        self.type_scorer = _TypeScorer(self.rows.encoder, weights, self.n_slots, self.cache_size)
        constants = np.where(self.rows.constant_known > 0, self.rows.constants, -1)
        self.constant_rows = self._weight_rows(constants)                   # (C, L)
        self.slot_offsets = self.rows.offsets.astype(np.int64)               # (K,), offsets[0] = 0
        self._kind_ids: dict[str, int] = {}
        self._kind_names: list[str] = []
        self._kind_range = np.zeros(0, dtype=np.uint32)
        self._kind_of_code: np.ndarray | None = None
        self._epoch = 0   # counts the table's fresh starts: rows of an older epoch mean nothing now
        # Tokenizer key -> table row (-1: unknown), filled under one tokenizer generation and one epoch;
        # the last entry stays -1 and is never a key's, so a key of -1 reads it (see `_rows_by_key`).
        self._row_of_key = np.full(1, -1, dtype=np.int64)      # (keys + 1,)
        self._key_generation: int | None = None
        self._key_epoch = 0
        # The whole table at once: untouched rows cost no memory (the system maps zero pages as they
        # are first written), and it never has to be copied to grow (unless one batch outgrows it).
        self._reset(capacity=self.cache_size + 1)

    def _weight_rows(self, ids: np.ndarray) -> np.ndarray:
        """W[ids] with a zero row for id -1 (a feature outside the vocabulary)."""
        rows = np.zeros((len(ids), self.n_labels))
        rows[ids >= 0] = self.weights[ids[ids >= 0]]
        return rows

    def _reset(self, capacity: int, compiled: bool | None = None, key_bytes: int = 0, tokens: int = 0) -> None:
        """Forget every type (the table keeps its memory). ``compiled``: index the types with the
        compiled type index (None: as before); ``key_bytes``, ``tokens``: make that index room for a
        batch of this many tokens and key bytes at least."""
        if compiled is None:
            compiled = getattr(self, "_index", None) is not None
        self._epoch += 1
        # Without kernels, two dict indexes to the rows: by text, for the first kind a text came with
        # (almost every text only ever has one), so that one C-level map per batch finds nearly every
        # token; and by (text, kind id) for a text's other kinds, looked up only for tokens whose text
        # came with another kind.
        self.row_of_text: dict[str, int] = {}
        self.row_of_type: dict[tuple[str, int], int] = {}
        self.n_rows = 1
        if hasattr(self, "table") and self.table.shape[0] >= capacity:
            # Keep the table: it refills to the same size, and freeing and regrowing it would make
            # resident memory rise and fall with every refill instead of staying flat.
            self.kind_of_row[1:] = _NO_KIND
        else:
            self.table = np.zeros((capacity, self.n_slots, self.n_labels))     # (capacity, K, L)
            self.kind_of_row = np.full(capacity, _NO_KIND, dtype=object)      # (capacity,) kind
            boundary = self.constant_rows[self.rows.boundary_base:]
            self.table[self._BOUNDARY, 1:] = boundary                           # slot k -> offsets[k]
        self._index = _TypeIndex.sized(getattr(self, "_index", None), self.cache_size + 1, key_bytes, tokens) \
            if compiled else None
        if compiled:
            self._grow(self._index.limit)

    def type_rows(self, texts: list[str], kinds: list[str], keys: np.ndarray | None = None,
                  generation: int | None = None) -> np.ndarray:
        """(N,) int64 table row of each token's type, scoring the types not seen before.

        ``keys`` (N,) int64 and ``generation``: the tokenizer's `TokenBatch.keys` and `.generation`; a
        token whose key (>= 0) was seen under this generation since the table last started afresh
        takes the row found for it then, without its text being looked up again. ``texts`` and
        ``kinds`` may be the tokenizer's lazy `TokenTexts` and `TokenKinds`: only the str of tokens
        looked up are made."""
        n = len(texts)
        if len(kinds) != n:
            raise DataError(f"{n} tokens but {len(kinds)} kinds")
        if keys is not None and generation is not None and n:
            keys = np.asarray(keys, dtype=np.int64)
            if keys.shape != (n,) or int(keys.min()) < -1:
                raise DataError(f"keys must be (N,) = ({n},) row ids or -1, got shape {keys.shape}")
            return self._rows_by_key(texts, kinds, keys, generation)
        return self._rows_by_type(texts, kinds)

    def _rows_by_key(self, texts: list[str], kinds: list[str], keys: np.ndarray, generation: int) -> np.ndarray:
        """`type_rows` of tokens with keys (N,): one gather for the tokens of known keys, the lookup of
        `_rows_by_type` for the others, whose keys are then recorded."""
        if generation != self._key_generation or self._epoch != self._key_epoch:
            self._row_of_key.fill(-1)      # the keys' rows, or the table's, were numbered afresh
            self._key_generation, self._key_epoch = generation, self._epoch
        if int(keys.max()) >= self._row_of_key.size - 1:    # grow, keeping the last entry free (-1)
            grown = np.full(max(int(keys.max()) + 2, 2 * self._row_of_key.size), -1, dtype=np.int64)
            grown[: self._row_of_key.size - 1] = self._row_of_key[:-1]
            self._row_of_key = grown
        rows = self._row_of_key.take(keys)                 # key -1 reads the last entry: -1
        unknown = np.flatnonzero(rows < 0)
        if not unknown.size:
            return rows
        if unknown.size < rows.size:
            epoch = self._epoch
            rows[unknown] = self._rows_by_type(texts, kinds, unknown)
            if self._epoch != epoch:
                # The table started afresh while placing the others: the rows taken by key are
                # the old table's. Every token's row from the lookup.
                unknown = np.arange(rows.size)
                rows = self._rows_by_type(texts, kinds)
        else:
            rows = self._rows_by_type(texts, kinds)
        if self._epoch != self._key_epoch:      # started afresh in this batch: the old keys' rows are gone
            self._row_of_key.fill(-1)
            self._key_epoch = self._epoch
            unknown = np.arange(rows.size)
        new_keys = keys[unknown]
        recorded = new_keys >= 0
        self._row_of_key[new_keys[recorded]] = rows[unknown[recorded]]
        return rows

    def _rows_by_type(self, texts: Sequence[str], kinds: Sequence[str], picked: np.ndarray | None = None) -> np.ndarray:
        """`type_rows` by the texts and kinds of the tokens ``picked`` (M,) (None: all of them)."""
        kernels = _feature_kernels()
        if (kernels is not None) != (self._index is not None):
            self._reset(capacity=self.table.shape[0], compiled=kernels is not None)   # switched: start afresh
        if kernels is not None:
            return self._placed_rows(*self._type_keys(texts, kinds, picked), kernels)
        texts, kinds = _picked(texts, kinds, slice(None) if picked is None else picked)
        n = len(texts)
        rows = np.fromiter(map(self.row_of_text.get, texts, repeat(self._BOUNDARY)), dtype=np.int64, count=n)
        # Kinds compared as objects: building the object array (none if ``kinds`` is one already) and
        # comparing (equal strings, mostly the very same objects) costs about half of a dict lookup per
        # token. Unused rows (and the boundary row) hold _NO_KIND, which equals no kind.
        other = np.flatnonzero(self.kind_of_row[rows] != np.asarray(kinds, dtype=object))  # new, or another kind
        if not other.size:
            return rows
        if self.n_rows + other.size > self.cache_size:
            # The table may have to start afresh, which would orphan the rows found above: redo all.
            self._reset(capacity=self.table.shape[0])
            other = np.arange(n)
            rows[:] = self._BOUNDARY
        picked = other.tolist()
        rows[other] = self._other_rows(_pick(texts, picked), _pick(kinds, picked), rows[other] != self._BOUNDARY)
        return rows

    def _type_keys(self, texts: Sequence[str], kinds: Sequence[str], picked: np.ndarray | None):
        """The keys of the compiled type index for the tokens ``picked`` (None: all): code points
        (C,) uint32 with each token's text at [starts, ends) (M,), kind ids (M,) int64, and the
        texts (M), made into str only when read. A tokenizer's lazy texts (`tokenize.TokenTexts`)
        give their batch's code points as they are; other texts are encoded."""
        code_points = getattr(texts, "code_points", None)
        if code_points is not None and hasattr(kinds, "codes"):
            chosen = np.arange(len(texts)) if picked is None else picked
            starts = texts.batch_starts[chosen]
            ends = starts + (texts.ends[chosen] - texts.starts[chosen])
            return code_points, starts, ends, self._kind_ids_of_codes()[kinds.codes[chosen]], _TextsAt(texts, chosen)
        texts, kinds = _picked(texts, kinds, slice(None) if picked is None else picked)
        n = len(texts)
        # A numpy copy: writable, as the tokenizer's code points (one compiled signature).
        code_points = np.frombuffer("".join(texts).encode("utf-32-le", "surrogatepass"), dtype=np.uint32).copy()
        ends = np.cumsum(np.fromiter(map(len, texts), dtype=np.int64, count=n))
        starts = ends - np.fromiter(map(len, texts), dtype=np.int64, count=n)
        kind_ids = np.fromiter(map(self._kind_ids.get, kinds, repeat(-1)), dtype=np.int64, count=n)
        for m in np.flatnonzero(kind_ids < 0).tolist():    # a kind seen for the first time
            kind_ids[m] = self._kind_id(kinds[m])
        return code_points, starts, ends, kind_ids, texts

    def _kind_ids_of_codes(self) -> np.ndarray:
        """(len(KINDS),) the kind id of each of the tokenizer's kind codes (indices into KINDS)."""
        if self._kind_of_code is None:
            from streamtag.tokenize import KINDS

            self._kind_of_code = np.array([self._kind_id(kind) for kind in KINDS], dtype=np.int64)
        return self._kind_of_code

    def _placed_rows(self, code_points: np.ndarray, starts: np.ndarray, ends: np.ndarray, kind_ids: np.ndarray,
                     texts: Sequence[str], kernels) -> np.ndarray:
        """`type_rows` by the compiled type index: each token's (text, kind), its text code_points[start:end]
        (M,) and its kind id (M,), found by one kernel (a dict lookup per token cost three times as
        much), the new types given the next rows in order of first appearance, then scored together.
        ``texts`` (M): the str of each token, read only for the few new types the kernels leave to
        Python (non-ASCII ones)."""
        n = starts.size
        rows = np.empty(n, dtype=np.int64)
        if n == 0:
            return rows
        firsts = np.empty(n, dtype=np.int64)
        index = self._index
        first = index.state[0]
        found = -1
        for fresh in (False, True):
            if fresh:
                # Out of rows or key room: start afresh, with room for the whole batch at least.
                self._reset(capacity=self.table.shape[0], compiled=True, key_bytes=int((ends - starts).sum()) + n,
                            tokens=n)
                index, first = self._index, 1
            found = kernels.place_types(code_points, starts, ends, self._kind_range, kind_ids, kind_ids + 1,
                                        index.slots, index.hash_bits, index.arena, index.state, index.limit,
                                        _MAX_CACHED_CHARS, rows, firsts)
            if found >= 0:
                break
        if found < 0:
            raise AssertionError("the type index has room for a whole batch after a fresh start")
        if found:
            chosen = firsts[:found]
            self._grow(first + found)
            self.type_scorer.scores(_TextsAt(texts, chosen), kind_ids[chosen], self._kind_names,
                                    out=self.table[first : first + found],
                                    encoded=(code_points, starts[chosen], ends[chosen]))
        self.n_rows = first + found
        return rows

    def _kind_id(self, kind: str) -> int:
        kind_id = self._kind_ids.get(kind)
        if kind_id is None:
            kind_id = self._kind_ids[kind] = len(self._kind_names)
            self._kind_names.append(kind)
            # The kinds' "code points" in the compiled type index's keys: kind id k is [k, k + 1).
            self._kind_range = np.arange(len(self._kind_names), dtype=np.uint32)
        return kind_id

    def _other_rows(self, texts: list[str], kinds: list[str], text_known: np.ndarray) -> np.ndarray:
        """(M,) rows of tokens the text index did not place: new types, or a known text's other kind
        (``text_known``). Scores the new types."""
        kind_ids = np.fromiter(map(self._kind_ids.get, kinds, repeat(-1)), dtype=np.int64, count=len(kinds))
        for n in np.flatnonzero(kind_ids < 0).tolist():    # a kind seen for the first time
            kind_ids[n] = self._kind_id(kinds[n])
        distinct = list(dict.fromkeys(texts))
        type_of_token = None
        if len(distinct) == len(texts):      # the usual case: each token is a type of its own
            type_texts, type_kinds, type_text_known = texts, kind_ids, text_known
        else:
            text_number = dict(zip(distinct, range(len(distinct))))
            numbers = np.fromiter(map(text_number.__getitem__, texts), dtype=np.int64, count=len(texts))
            kind_of_text = np.empty(len(distinct), dtype=np.int64)
            kind_of_text[numbers] = kind_ids
            if np.array_equal(kind_of_text[numbers], kind_ids):    # each text with one kind (usual)
                type_of_token, type_texts, type_kinds = numbers, distinct, kind_of_text
                type_text_known = np.zeros(len(distinct), dtype=bool)
                type_text_known[numbers] = text_known
            else:
                _, first, type_of_token = np.unique(numbers * len(self._kind_names) + kind_ids, return_index=True,
                                                    return_inverse=True)
                type_texts = [texts[i] for i in first.tolist()]
                type_kinds, type_text_known = kind_ids[first], text_known[first]
        rows = np.zeros(len(type_texts), dtype=np.int64)
        for n in np.flatnonzero(type_text_known).tolist():     # rare: a text with a second kind
            rows[n] = self.row_of_type.get((type_texts[n], int(type_kinds[n])), 0)
        new = np.flatnonzero(rows == 0)
        if new.size == rows.size:
            all_texts_new = len(type_texts) == len(distinct) and not type_text_known.any()
            rows[:] = self._add_types(type_texts, type_kinds, all_texts_new)
        elif new.size:
            rows[new] = self._add_types([type_texts[n] for n in new.tolist()], type_kinds[new], False)
        return rows if type_of_token is None else rows[type_of_token.reshape(-1)]

    def _add_types(self, texts: list[str], kind_ids: np.ndarray, all_texts_new: bool) -> np.ndarray:
        """Score new types (texts[m], kind ids[m]) into the table; (M,) their rows.

        ``all_texts_new``: the texts are distinct and none has a row yet (the usual case)."""
        first, n_new = self.n_rows, len(texts)
        self._grow(first + n_new)
        self.type_scorer.scores(texts, kind_ids, self._kind_names, out=self.table[first : first + n_new])
        self.n_rows = first + n_new
        self.kind_of_row[first : first + n_new] = np.array(self._kind_names, dtype=object)[kind_ids]
        # Long texts seldom repeat: scored, not kept.
        if all_texts_new and max(map(len, texts)) <= _MAX_CACHED_CHARS:
            self.row_of_text.update(zip(texts, range(first, first + n_new)))
        else:
            row_of_text, row_of_type = self.row_of_text, self.row_of_type
            for text, kind_id, row in zip(texts, kind_ids.tolist(), range(first, first + n_new)):
                if len(text) > _MAX_CACHED_CHARS:
                    continue
                if text in row_of_text:
                    row_of_type[(text, kind_id)] = row
                else:
                    row_of_text[text] = row
        return np.arange(first, first + n_new)

    def _grow(self, needed: int) -> None:
        capacity = self.table.shape[0]
        if needed <= capacity:
            return
        while capacity < needed:
            capacity *= 2
        grown = np.zeros((capacity, self.n_slots, self.n_labels))
        grown[: self.n_rows] = self.table[: self.n_rows]
        self.table = grown
        kinds = np.full(capacity, _NO_KIND, dtype=object)
        kinds[: self.n_rows] = self.kind_of_row[: self.n_rows]
        self.kind_of_row = kinds

    def emissions(self, rows: np.ndarray, lengths: np.ndarray) -> np.ndarray:
        """E (N, L) for tokens of type rows ``rows`` (N,) in sequences of ``lengths`` (S,)."""
        rows = np.ascontiguousarray(rows, dtype=np.int64)
        lengths = np.ascontiguousarray(lengths, dtype=np.int64)
        n = rows.size
        if int(lengths.sum()) != n:
            raise ValueError(f"lengths sum to {int(lengths.sum())}, but there are {n} tokens")
        kernel = _emission_kernel()
        if kernel is not None and n:
            # Compiled: one pass per token instead of a dozen numpy passes over (N, L); same sums.
            E = np.empty((n, self.n_labels))
            kernel(self.table, rows, lengths, self.slot_offsets, self.constant_rows, self.rows.rel_base,
                   self.spec.relative_buckets, self.spec.first_last, E)
            return E
        return self._emissions_numpy(rows, lengths)

    def _emissions_numpy(self, rows: np.ndarray, lengths: np.ndarray) -> np.ndarray:
        """`emissions` in numpy: the reference for the compiled kernel."""
        n = rows.size
        E = self.table[rows, 0]
        if n == 0:
            return E
        constants, rows_builder = self.constant_rows, self.rows
        E += constants[0]                                                   # bias
        seq_start = np.cumsum(lengths) - lengths
        nonempty = lengths > 0
        if self.spec.first_last:
            E[seq_start[nonempty]] += constants[1]
            E[(seq_start + lengths - 1)[nonempty]] += constants[2]
        line_length = np.repeat(lengths, lengths)
        position = np.arange(n) - np.repeat(seq_start, lengths)
        if self.spec.relative_buckets:
            bucket = position * self.spec.relative_buckets // line_length
            E += constants[rows_builder.rel_base + bucket]
        for slot, offset in enumerate(rows_builder.offsets[1:].tolist(), start=1):
            neighbour = position + offset
            inside = (neighbour >= 0) & (neighbour < line_length)
            neighbour_rows = np.where(inside, rows[np.clip(np.arange(n) + offset, 0, n - 1)], self._BOUNDARY)
            E += self.table[neighbour_rows, slot]
        return E


__all__ = ["FeatureSpec", "FeatureExtractor", "EmissionScorer", "token_types", "WindowOffset", "GROUPS", "FLAGS", "word_shape",
           "collapse_runs", "SPEC_VERSION"]
