"""Tests for streamtag.features.

The vectorised extractor is checked against a plain reference written below (one token at a time,
one feature at a time, straight from the spec dict), and its sparse output against scipy's own
vstack. Character classes come from Python's str methods (the Unicode character database).
"""

import json
from collections import Counter

import numpy as np
import pytest
import scipy.sparse
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from streamtag.errors import ConfigError, DataError, StreamtagError
from streamtag.features import (
    EmissionScorer,
    _emission_kernel,
    FeatureExtractor,
    FeatureSpec,
    collapse_runs,
    word_shape,
)

ALL_FLAGS = [
    "has_digit", "all_digit", "has_alpha", "has_upper", "has_lower", "all_upper", "all_lower",
    "title", "initial_upper", "mixed_alnum", "no_alnum", "has_dash", "has_dot", "has_underscore",
    "has_slash", "has_colon", "has_at", "has_equals",
]
ALL_GROUPS = ["lower", "shape", "collapsed_shape", "prefix", "suffix", "flags", "kind", "length",
              "wordlists"]

FULL_SPEC = {
    "version": 1,
    "token": {
        "groups": ALL_GROUPS,
        "max_value_chars": 6,
        "prefix_lengths": [1, 2, 3],
        "suffix_lengths": [2, 4],
        "flags": ALL_FLAGS,
        "length_bounds": [1, 3, 5],
    },
    "position": {"first_last": True, "relative_buckets": 3},
    "window": [
        {"offset": -2, "groups": ["lower", "kind"]},
        {"offset": -1, "groups": ["lower", "shape", "suffix"]},
        {"offset": 1, "groups": ["collapsed_shape", "prefix", "flags"]},
        {"offset": 3, "groups": ["wordlists", "length"]},
    ],
    # invented, generic words
    "wordlists": {"svc": ["daemon", "proxy"], "bad": ["failed", "Denied"]},
}


# --- plain reference implementation --------------------------------------------------------------

def ref_shape(text):
    """Word shape, one character at a time (common practice: X upper, x lower, d digit, rest kept)."""
    out = ""
    for char in text:
        if char.isupper():
            out += "X"
        elif char.isalpha():
            out += "x"      # letters without case are written as lower, as the spec documents
        elif char.isdigit():
            out += "d"
        else:
            out += char
    return out


def ref_collapse(shape):
    out = ""
    for char in shape:
        if not out or out[-1] != char:
            out += char
    return out


def ref_flag(name, text):
    """Flags written with Python's str character predicates (Unicode character database)."""
    letters = [c for c in text if c.isalpha()]
    digits = [c for c in text if c.isdigit()]
    if name == "has_digit":
        return len(digits) > 0
    if name == "all_digit":
        return len(digits) == len(text)
    if name == "has_alpha":
        return len(letters) > 0
    if name == "has_upper":
        return any(c.isupper() for c in text)
    if name == "has_lower":
        return any(c.isalpha() and not c.isupper() for c in text)
    if name == "all_upper":
        return text.isupper()
    if name == "all_lower":
        return text.islower()
    if name == "title":
        return text.istitle()
    if name == "initial_upper":
        return text[0].isupper()
    if name == "mixed_alnum":
        return len(letters) > 0 and len(digits) > 0
    if name == "no_alnum":
        return not letters and not digits
    symbol = {"has_dash": "-", "has_dot": ".", "has_underscore": "_", "has_slash": "/",
              "has_colon": ":", "has_at": "@", "has_equals": "="}[name]
    return symbol in text


def ref_group(group, text, kind, cfg):
    token = cfg["token"]
    cut = token["max_value_chars"]
    lower = text.lower()
    if group == "lower":
        return ["lower=" + lower[:cut]]
    if group == "shape":
        return ["shape=" + ref_shape(text)[:cut]]
    if group == "collapsed_shape":
        return ["cshape=" + ref_collapse(ref_shape(text))[:cut]]
    if group == "prefix":
        return ["p%d=%s" % (n, lower[:n]) for n in token["prefix_lengths"] if len(lower) >= n]
    if group == "suffix":
        return ["s%d=%s" % (n, lower[len(lower) - n:]) for n in token["suffix_lengths"]
                if len(lower) >= n]
    if group == "flags":
        return ["flag=" + name for name in token["flags"] if ref_flag(name, text)]
    if group == "kind":
        return ["kind=" + kind]
    if group == "length":
        bounds = token["length_bounds"]
        for bound in bounds:
            if len(text) <= bound:
                return ["len<=%d" % bound]
        return ["len>%d" % bounds[-1]]
    if group == "wordlists":
        return ["list=" + name for name, words in sorted(cfg["wordlists"].items())
                if lower in [w.lower() for w in words]]
    raise AssertionError(group)


def ref_features(texts, kinds, cfg):
    """Feature strings of every token of one line, written out plainly."""
    n = len(texts)
    rows = []
    for i in range(n):
        row = ["bias"]
        if cfg["position"]["first_last"] and i == 0:
            row.append("pos=first")
        if cfg["position"]["first_last"] and i == n - 1:
            row.append("pos=last")
        buckets = cfg["position"]["relative_buckets"]
        if buckets:
            row.append("rel=%d" % (i * buckets // n))
        for group in cfg["token"]["groups"]:
            row += ref_group(group, texts[i], kinds[i], cfg)
        for entry in cfg["window"]:
            offset = entry["offset"]
            label = ("+%d" % offset) if offset > 0 else str(offset)
            j = i + offset
            if j < 0:
                row.append(label + "|BOS")
            elif j >= n:
                row.append(label + "|EOS")
            else:
                for group in entry["groups"]:
                    row += [label + "|" + s for s in ref_group(group, texts[j], kinds[j], cfg)]
        rows.append(row)
    return rows


def decoded_rows(matrix, vocabulary):
    """Column names of each CSR row, checking that every entry is a single 1.0."""
    rows = []
    for i in range(matrix.shape[0]):
        columns = matrix.indices[matrix.indptr[i]:matrix.indptr[i + 1]]
        values = matrix.data[matrix.indptr[i]:matrix.indptr[i + 1]]
        assert len(set(columns.tolist())) == len(columns), "a column appears twice in one row"
        assert np.all(values == 1.0)
        rows.append(sorted(vocabulary[j] for j in columns))
    return rows


# --- strategies ----------------------------------------------------------------------------------

# Characters chosen to reach every branch of the character classes: ASCII classes, punctuation used in
# log tokens, the separator "|", and non-ASCII letters/digits (É upper, ß lower, ǅ title-case,
# İ whose lower case is two code points, Arabic-Indic digit ٣, superscript two).
ALPHABET = "aZk09-._/:@=|#" + "Éßǅİ٣²"
POOL = ["Daemon", "PROXY", "failed", "denied", "sshd", "10.4.7.21", "Host", "2024", ":", "ab-cd"]
KINDS = ["word", "number", "punct", "ipv4"]

token_text = st.one_of(st.sampled_from(POOL), st.text(ALPHABET, min_size=1, max_size=9))


@st.composite
def sentences(draw, max_tokens=8):
    texts = draw(st.lists(token_text, min_size=0, max_size=max_tokens))
    kinds = draw(st.lists(st.sampled_from(KINDS), min_size=len(texts), max_size=len(texts)))
    return (texts, kinds)


batches = st.lists(sentences(), min_size=1, max_size=6)


@st.composite
def spec_dicts(draw):
    offsets = draw(st.lists(st.sampled_from([-3, -2, -1, 1, 2, 3]), unique=True, max_size=4))
    group_subset = st.lists(st.sampled_from(ALL_GROUPS), unique=True, max_size=5)
    return {
        "version": 1,
        "token": {
            "groups": draw(group_subset),
            "max_value_chars": draw(st.integers(1, 10)),
            "prefix_lengths": sorted(draw(st.sets(st.integers(1, 4), max_size=3))),
            "suffix_lengths": sorted(draw(st.sets(st.integers(1, 4), max_size=3))),
            "flags": draw(st.lists(st.sampled_from(ALL_FLAGS), unique=True)),
            "length_bounds": sorted(draw(st.sets(st.integers(1, 9), min_size=1, max_size=3))),
        },
        "position": {"first_last": draw(st.booleans()), "relative_buckets": draw(st.integers(0, 4))},
        "window": [{"offset": o, "groups": draw(group_subset)} for o in offsets],
        "wordlists": {"svc": ["daemon", "proxy"], "bad": ["failed", "Denied"]},
    }


# --- shapes, affixes, flags ----------------------------------------------------------------------

def test_word_shape_common_examples():
    # common practice (word-shape features of NER taggers): X upper, x lower, d digit, rest kept
    assert word_shape("Host") == "Xxxx"
    assert word_shape("2024") == "dddd"
    assert word_shape("eth0:1") == "xxxd:d"
    assert word_shape("10.4.7.21") == "dd.d.d.dd"
    # collapsed ("short") shape: each run of one class becomes one character, common practice
    assert collapse_runs("Xxxx") == "Xx"
    assert collapse_runs("dddd") == "d"
    assert collapse_runs("dd.d.d.dd") == "d.d.d.d"


def test_shape_of_non_ascii_follows_unicode_classes():
    # Unicode character database via Python's str predicates: É is upper, ß lower, ٣ (Arabic-Indic
    # three) a digit, ² a digit (str.isdigit), « neither
    assert word_shape("Élan") == "Xxxx"
    assert word_shape("straße") == "xxxxxx"
    assert word_shape("٣٣") == "dd"
    assert word_shape("x²") == "xd"
    assert word_shape("«a»") == "«x»"


@given(st.text(ALPHABET + "xX ", max_size=20))
def test_shape_matches_plain_reference(text):
    assert word_shape(text) == ref_shape(text)
    assert collapse_runs(word_shape(text)) == ref_collapse(ref_shape(text))


def test_prefix_and_suffix_features():
    spec = FeatureSpec.from_dict({"token": {"groups": ["prefix", "suffix"], "prefix_lengths": [1, 2, 3],
                                            "suffix_lengths": [1, 3, 5]}})
    rows = FeatureExtractor(spec).feature_strings(["Daemon", "ab"], ["word", "word"])
    # affixes are string slices of the lower-cased token (common practice); none longer than the token
    affixes = [[f for f in row if f[0] in "ps" and f[1].isdigit()] for row in rows]
    assert affixes[0] == ["p1=d", "p2=da", "p3=dae", "s1=n", "s3=mon", "s5=aemon"]
    assert affixes[1] == ["p1=a", "p2=ab", "s1=b"]


@given(st.text(ALPHABET, min_size=1, max_size=12))
def test_flags_match_python_character_predicates(text):
    spec = FeatureSpec.from_dict({"token": {"groups": ["flags"], "flags": ALL_FLAGS}})
    got = {f for f in FeatureExtractor(spec).feature_strings([text], ["word"])[0]
           if f.startswith("flag=")}
    assert got == {"flag=" + name for name in ALL_FLAGS if ref_flag(name, text)}


def test_flags_on_log_tokens():
    spec = FeatureSpec.from_dict({"token": {"groups": ["flags"], "flags": ALL_FLAGS}})
    rows = FeatureExtractor(spec).feature_strings(["HTTP", "Host", "web-03", "2024"], ["word"] * 4)
    flags = [{f[5:] for f in row if f.startswith("flag=")} for row in rows]
    # str.isupper / str.istitle semantics (Python reference)
    assert {"all_upper", "has_upper", "initial_upper"} <= flags[0] and "title" not in flags[0]
    assert {"title", "initial_upper", "has_lower"} <= flags[1] and "all_upper" not in flags[1]
    assert {"has_dash", "mixed_alnum", "all_lower"} <= flags[2]
    assert {"all_digit", "has_digit"} <= flags[3] and "has_alpha" not in flags[3]


def test_value_cut_and_length_bucket():
    spec = FeatureSpec.from_dict({"token": {"groups": ["lower", "shape", "length"],
                                            "max_value_chars": 4, "length_bounds": [2, 8]}})
    rows = FeatureExtractor(spec).feature_strings(["AbCdEfGhIjK", "ab", "abc"], ["word"] * 3)
    assert "lower=abcd" in rows[0] and "shape=XxXx" in rows[0] and "len>8" in rows[0]
    assert "len<=2" in rows[1] and "len<=8" in rows[2]


def test_wordlist_fires_on_lower_cased_membership():
    spec = FeatureSpec.from_dict({"token": {"groups": ["wordlists"]},
                                  "wordlists": {"svc": ["Daemon", "proxy"]}})
    rows = FeatureExtractor(spec).feature_strings(["DAEMON", "proxy", "proxies"], ["word"] * 3)
    assert "list=svc" in rows[0] and "list=svc" in rows[1] and "list=svc" not in rows[2]


# --- the extractor against the plain reference ---------------------------------------------------

SETTINGS = settings(max_examples=60, deadline=None, suppress_health_check=[HealthCheck.too_slow])


@SETTINGS
@given(spec_dicts(), batches)
def test_transform_matches_reference(cfg, batch):
    extractor = FeatureExtractor(FeatureSpec.from_dict(cfg))
    vocabulary = extractor.fit(batch)
    matrix, lengths = extractor.transform(batch)
    expected = [sorted(row) for texts, kinds in batch for row in ref_features(texts, kinds, cfg)]
    assert lengths.dtype == np.int64 and lengths.tolist() == [len(t) for t, _ in batch]
    assert matrix.shape == (len(expected), len(vocabulary)) and matrix.dtype == np.float64
    assert decoded_rows(matrix, vocabulary) == expected
    # feature_strings is the inspection view of the same thing
    for texts, kinds in batch:
        assert [sorted(r) for r in extractor.feature_strings(texts, kinds)] == \
               [sorted(r) for r in ref_features(texts, kinds, cfg)]


def test_window_shifts_with_boundary_markers():
    extractor = FeatureExtractor(FeatureSpec.from_dict(FULL_SPEC))
    texts, kinds = ["sshd", "failed", "for", "PROXY"], ["word"] * 4
    extractor.fit([(texts, kinds)])
    rows = decoded_rows(extractor.transform([(texts, kinds)])[0], extractor.vocabulary)
    assert "-2|BOS" in rows[0] and "-1|BOS" in rows[0] and "-1|BOS" not in rows[1]
    assert "-2|BOS" in rows[1] and "-2|lower=sshd" in rows[2]
    assert "-1|lower=sshd" in rows[1] and "+1|p1=f" in rows[0]
    assert "+3|list=svc" in rows[0] and "+3|EOS" in rows[1]
    assert "+1|EOS" in rows[3] and "pos=last" in rows[3] and "pos=first" in rows[0]


def test_unseen_features_are_ignored():
    extractor = FeatureExtractor(FeatureSpec.from_dict(FULL_SPEC))
    train = [(["login", "failed", "for", "mara"], ["word"] * 4)]
    extractor.fit(train)
    other = (["login", "refused", "by", "Zelbor", "gateway"], ["word"] * 5)
    matrix, _ = extractor.transform([other])
    known = set(extractor.vocabulary)
    expected = [sorted(set(row) & known) for row in ref_features(*other, FULL_SPEC)]
    assert matrix.shape[1] == len(extractor.vocabulary)
    assert decoded_rows(matrix, extractor.vocabulary) == expected


def test_extractor_built_from_a_stored_vocabulary():
    fitted = FeatureExtractor(FeatureSpec.from_dict(FULL_SPEC))
    batch = [(["Host", "web-03", "up"], ["word"] * 3)]
    fitted.fit(batch)
    loaded = FeatureExtractor(FeatureSpec.from_dict(fitted.spec.to_dict()), fitted.vocabulary)
    assert (fitted.transform(batch)[0] != loaded.transform(batch)[0]).nnz == 0


@SETTINGS
@given(batches, st.integers(1, 4))
def test_min_count_keeps_features_seen_often_enough(batch, min_count):
    extractor = FeatureExtractor(FeatureSpec.from_dict(FULL_SPEC))
    counts = Counter(f for texts, kinds in batch for row in ref_features(texts, kinds, FULL_SPEC)
                     for f in row)
    expected = sorted(f for f, c in counts.items() if c >= min_count)
    assert extractor.fit(batch, min_count=min_count) == expected
    # chunked counting over a one-shot iterator gives the same vocabulary
    assert extractor.fit(iter(batch), min_count=min_count, chunk_size=1) == expected


@SETTINGS
@given(st.lists(batches, min_size=1, max_size=4), st.integers(1, 5))
def test_cache_eviction_does_not_change_results(batch_list, cache_size):
    spec = FeatureSpec.from_dict(FULL_SPEC)
    vocabulary = FeatureExtractor(spec).fit([s for b in batch_list for s in b])
    roomy = FeatureExtractor(spec, vocabulary)
    tight = FeatureExtractor(spec, vocabulary, cache_size=cache_size)
    for batch in batch_list + batch_list:     # second pass hits whatever the cache kept
        a, b = roomy.transform(batch)[0], tight.transform(batch)[0]
        assert a.shape == b.shape and (a != b).nnz == 0
    assert len(tight._rows.cache) <= cache_size


@SETTINGS
@given(spec_dicts(), batches)
def test_batch_equals_stacked_single_sentences(cfg, batch):
    extractor = FeatureExtractor(FeatureSpec.from_dict(cfg))
    extractor.fit(batch)
    together, lengths = extractor.transform(batch)
    singles = [extractor.transform([sentence]) for sentence in batch]
    # scipy.sparse.vstack as the reference for stacking rows
    stacked = scipy.sparse.vstack([m for m, _ in singles], format="csr")
    assert together.shape == stacked.shape and (together != stacked).nnz == 0
    assert lengths.tolist() == [int(l[0]) for _, l in singles]


def test_empty_batch_and_empty_lines():
    extractor = FeatureExtractor(FeatureSpec.from_dict(FULL_SPEC))
    extractor.fit([(["a"], ["word"])])
    matrix, lengths = extractor.transform([])
    assert matrix.shape == (0, len(extractor.vocabulary)) and lengths.tolist() == []
    matrix, lengths = extractor.transform([([], []), (["a"], ["word"]), ([], [])])
    assert matrix.shape[0] == 1 and lengths.tolist() == [0, 1, 0]


def test_mismatched_kinds_is_a_data_error():
    extractor = FeatureExtractor(FeatureSpec.from_dict(FULL_SPEC))
    with pytest.raises(DataError, match="2 tokens but 1 kinds"):
        extractor.transform([(["a", "b"], ["word"])])


# --- spec round trip and the shipped files ------------------------------------------------------

@SETTINGS
@given(spec_dicts())
def test_to_dict_round_trips_through_json(cfg):
    spec = FeatureSpec.from_dict(cfg)
    stored = json.loads(json.dumps(spec.to_dict()))    # the model file keeps it as JSON
    again = FeatureSpec.from_dict(stored)
    assert again == spec and again.to_dict() == spec.to_dict()


def test_word_lists_are_embedded_so_config_is_not_needed(tmp_path):
    (tmp_path / "lists").mkdir()
    (tmp_path / "lists" / "svc.txt").write_text("# generic words\nDaemon\n\nproxy\n")
    (tmp_path / "spec.toml").write_text('[token]\ngroups = ["wordlists"]\n'
                                        '[wordlists]\nsvc = "lists/svc.txt"\n')
    stored = FeatureSpec.from_toml(tmp_path / "spec.toml").to_dict()
    assert stored["wordlists"] == {"svc": ["daemon", "proxy"]}
    (tmp_path / "lists" / "svc.txt").unlink()
    extractor = FeatureExtractor(FeatureSpec.from_dict(stored))
    assert "list=svc" in extractor.feature_strings(["PROXY"], ["word"])[0]


def test_shipped_config_and_packaged_default_agree():
    from pathlib import Path
    config = Path(__file__).resolve().parents[1] / "config" / "features.toml"
    spec = FeatureSpec.from_toml(config)
    assert FeatureSpec.default() == spec
    assert {name for name, _ in spec.wordlists} == {"service_words", "failure_words"}
    assert all(words for _, words in spec.wordlists)


# --- bad configuration -----------------------------------------------------------------------------

BAD_CONFIGS = [
    ('colour = "blue"\n', "colour"),
    ('[token]\ngroupz = ["lower"]\n', "token.groupz"),
    ('[token]\ngroups = "lower"\n', "token.groups"),
    ('[token]\ngroups = ["lower", "vibes"]\n', "token.groups"),
    ('[token]\nflags = ["has_sparkle"]\n', "token.flags"),
    ('[token]\nprefix_lengths = [0]\n', "token.prefix_lengths"),
    ('[token]\nmax_value_chars = "10"\n', "token.max_value_chars"),
    ('[token]\nlength_bounds = [3, 2]\n', "token.length_bounds"),
    ('[position]\nfirst_last = 1\n', "position.first_last"),
    ('[position]\nrelative_buckets = -1\n', "position.relative_buckets"),
    ('[position]\nmiddle = true\n', "position.middle"),
    ('[[window]]\noffset = 0\ngroups = ["lower"]\n', "window[0].offset"),
    ('[[window]]\noffset = 1\n[[window]]\noffset = 1\n', "window[1].offset"),
    ('[[window]]\ngroups = ["lower"]\n', "window[0].offset"),
    ('[[window]]\noffset = 1\nsize = 2\n', "window[0].size"),
    ('[wordlists]\nsvc = "missing.txt"\n', "wordlists.svc"),
    ('[wordlists]\nsvc = 3\n', "wordlists.svc"),
    ('[wordlists]\n"Bad Name" = ["x"]\n', "wordlists.Bad Name"),
    ('version = 2\n', "version"),
    ('token = 3\n', "token"),
]


@pytest.mark.parametrize("text,key", BAD_CONFIGS)
def test_bad_config_is_one_line_naming_file_and_key(tmp_path, text, key):
    path = tmp_path / "features.toml"
    path.write_text(text)
    with pytest.raises(ConfigError) as caught:
        FeatureSpec.from_toml(path)
    message = str(caught.value)
    assert "\n" not in message and str(path) in message and f"{key}:" in message
    assert isinstance(caught.value, StreamtagError)


def test_unreadable_or_broken_toml_is_a_config_error(tmp_path):
    with pytest.raises(ConfigError, match="cannot read"):
        FeatureSpec.from_toml(tmp_path / "absent.toml")
    path = tmp_path / "broken.toml"
    path.write_text("[token\n")
    with pytest.raises(ConfigError, match="not valid TOML") as caught:
        FeatureSpec.from_toml(path)
    assert "\n" not in str(caught.value)


def test_bad_min_count():
    with pytest.raises(ConfigError, match="min_count"):
        FeatureExtractor(FeatureSpec()).fit([], min_count=0)


def test_vocabulary_entries_the_spec_never_produces_never_fire():
    # A vocabulary from elsewhere may hold strings this spec cannot produce: an offset it has no
    # window for, a group not used at that offset, or free text. They must stay empty columns.
    cfg = {"token": {"groups": ["lower"]}, "window": [{"offset": -1, "groups": ["lower"]}]}
    vocabulary = ["+2|lower=b", "-1|p1=a", "p1=a", "junk", "lower=a", "-1|lower=a", "shape=x"]
    extractor = FeatureExtractor(FeatureSpec.from_dict(cfg), vocabulary)
    matrix, _ = extractor.transform([(["a", "a", "b"], ["word"] * 3)])
    rows = decoded_rows(matrix, vocabulary)
    # expected from the plain reference, restricted to the vocabulary
    cfg_full = {"token": {**FULL_SPEC["token"], "groups": ["lower"]}, "position": FULL_SPEC["position"],
                "window": cfg["window"], "wordlists": {}}
    expected = [sorted(set(r) & set(vocabulary)) for r in ref_features(["a", "a", "b"], ["word"] * 3,
                                                                        cfg_full)]
    assert rows == expected == [["lower=a"], ["-1|lower=a", "lower=a"], ["-1|lower=a"]]


def test_long_tokens_match_reference_and_are_not_cached():
    # A log can hold long distinct tokens (base64 blobs); they must be featurised exactly like short
    # ones but must not pile up in the cache.
    blob = "Qm9ndXNEYXRh" * 40           # 480 characters, invented
    texts, kinds = ["key", blob, "end"], ["word", "hex", "word"]
    extractor = FeatureExtractor(FeatureSpec.from_dict(FULL_SPEC))
    extractor.fit([(texts, kinds)])
    rows = decoded_rows(extractor.transform([(texts, kinds)])[0], extractor.vocabulary)
    assert rows == [sorted(r) for r in ref_features(texts, kinds, FULL_SPEC)]
    assert all(len(text) < len(blob) for text, _ in extractor._rows.cache)


def test_fit_reports_the_sentence_number_across_chunks():
    extractor = FeatureExtractor(FeatureSpec.from_dict(FULL_SPEC))
    sentences = [(["a"], ["word"])] * 5 + [(["a", "b"], ["word"])]
    with pytest.raises(DataError, match="sentence 5:"):
        extractor.fit(sentences, chunk_size=2)


@SETTINGS
@given(batches)
def test_shipped_spec_matches_reference(batch):
    cfg = FeatureSpec.default().to_dict()
    extractor = FeatureExtractor(FeatureSpec.default())
    vocabulary = extractor.fit(batch)
    expected = [sorted(row) for texts, kinds in batch for row in ref_features(texts, kinds, cfg)]
    assert decoded_rows(extractor.transform(batch)[0], vocabulary) == expected


# --- emission scores without the matrix (the decoding fast path) ------------------------------------
# Reference: the sparse product X @ W computed by scipy.sparse on the extractor's CSR matrix (itself
# checked against the plain reference extractor above).

def _reference_emissions(extractor, batch, weights):
    matrix, lengths = extractor.transform(batch)
    return np.asarray(matrix @ weights), lengths


def _flat(batch):
    return [t for texts, _ in batch for t in texts], [k for _, kinds in batch for k in kinds]


@SETTINGS
@given(spec_dicts(), st.lists(batches, min_size=1, max_size=3), st.integers(1, 6), st.integers(0, 2**32 - 1))
def test_emission_scorer_equals_sparse_product(cfg, batch_list, cache_size, seed):
    extractor = FeatureExtractor(FeatureSpec.from_dict(cfg))
    extractor.fit([s for b in batch_list for s in b])
    weights = np.random.default_rng(seed).normal(size=(extractor.n_features, 3))
    scorer = EmissionScorer(extractor, weights, cache_size=cache_size)   # tiny: forces fresh starts
    for batch in batch_list + batch_list:    # the second pass meets whatever the table kept
        expected, lengths = _reference_emissions(extractor, batch, weights)
        got = scorer.emissions(scorer.type_rows(*_flat(batch)), lengths)
        assert got.shape == expected.shape
        np.testing.assert_allclose(got, expected, rtol=0, atol=1e-9)
    assert scorer.n_rows <= max(cache_size, max(sum(map(len, t)) for b in batch_list for t, _ in b)) + 1


def test_emission_scorer_keeps_a_text_with_two_kinds_apart():
    # The same text can come with two kinds (e.g. a port number alone or as part of an address);
    # each kind has its own features, so its own scores.
    extractor = FeatureExtractor(FeatureSpec.from_dict(FULL_SPEC))
    batch = [(["8080", "open", "8080"], ["number", "word", "ident"]), (["8080"], ["ident"])]
    extractor.fit(batch)
    weights = np.random.default_rng(3).normal(size=(extractor.n_features, 4))
    scorer = EmissionScorer(extractor, weights)
    for sub in ([batch[1]], batch, [batch[0]], batch):
        expected, lengths = _reference_emissions(extractor, sub, weights)
        np.testing.assert_allclose(scorer.emissions(scorer.type_rows(*_flat(sub)), lengths), expected,
                                   rtol=0, atol=1e-9)
        # kinds may also come as an object array (as a tokenizer keeps them): the same rows
        texts, kinds = _flat(sub)
        assert np.array_equal(scorer.type_rows(texts, np.array(kinds, dtype=object)), scorer.type_rows(texts, kinds))


def test_emission_scorer_scores_long_texts_without_keeping_them():
    extractor = FeatureExtractor(FeatureSpec.from_dict(FULL_SPEC))
    long_text = "x" * 300
    batch = [(["a", long_text, "b"], ["word"] * 3)]
    extractor.fit(batch)
    weights = np.random.default_rng(5).normal(size=(extractor.n_features, 2))
    scorer = EmissionScorer(extractor, weights, cache_size=10)
    for _ in range(30):    # the long type is scored again each time, and the table stays bounded
        expected, lengths = _reference_emissions(extractor, batch, weights)
        np.testing.assert_allclose(scorer.emissions(scorer.type_rows(*_flat(batch)), lengths), expected,
                                   rtol=0, atol=1e-9)
    assert scorer.n_rows <= 10 + 3
    roomy = EmissionScorer(extractor, weights)
    before, after = roomy.type_rows(*_flat(batch)), roomy.type_rows(*_flat(batch))
    assert before[0] == after[0] and before[1] != after[1]    # "a" kept, the long text scored anew


def test_emission_scorer_empty_and_bad_input():
    extractor = FeatureExtractor(FeatureSpec.from_dict(FULL_SPEC))
    extractor.fit([(["a"], ["word"])])
    scorer = EmissionScorer(extractor, np.zeros((extractor.n_features, 3)))
    assert scorer.emissions(scorer.type_rows([], []), np.zeros(2, dtype=np.int64)).shape == (0, 3)
    with pytest.raises(DataError):
        scorer.type_rows(["a"], [])
    with pytest.raises(ValueError):
        EmissionScorer(extractor, np.zeros((extractor.n_features + 1, 3)))


@SETTINGS
@given(st.lists(st.lists(st.text(st.characters(min_codepoint=33, max_codepoint=126), min_size=1, max_size=8),
                         min_size=1, max_size=6), min_size=1, max_size=4))
def test_emission_scorer_case_flags_of_ascii_tokens(lines):
    # For ASCII text the scorer reads str.isupper/islower/istitle off the word shape; Python's own
    # predicates on the text (through the reference extractor) are the reference.
    cfg = {"version": 1, "token": {"groups": ["flags", "shape"], "flags": ["all_upper", "all_lower", "title"]}}
    extractor = FeatureExtractor(FeatureSpec.from_dict(cfg))
    batch = [(texts, ["word"] * len(texts)) for texts in lines]
    extractor.fit(batch)
    weights = np.random.default_rng(len(lines)).normal(size=(extractor.n_features, 2))
    scorer = EmissionScorer(extractor, weights)
    expected, lengths = _reference_emissions(extractor, batch, weights)
    np.testing.assert_allclose(scorer.emissions(scorer.type_rows(*_flat(batch)), lengths), expected,
                               rtol=0, atol=1e-9)


@SETTINGS
@given(spec_dicts(), batches, st.integers(0, 2**32 - 1))
def test_compiled_emissions_equal_the_numpy_code(cfg, batch, seed):
    # The numba kernel adds the same blocks in the same order as the numpy code: equal bit for bit.
    extractor = FeatureExtractor(FeatureSpec.from_dict(cfg))
    extractor.fit(batch)
    scorer = EmissionScorer(extractor, np.random.default_rng(seed).normal(size=(extractor.n_features, 3)))
    rows = scorer.type_rows(*_flat(batch))
    lengths = np.array([len(texts) for texts, _ in batch], dtype=np.int64)
    assert _emission_kernel() is not None      # numba is a dependency: the kernel must load
    compiled = scorer.emissions(rows, lengths)
    assert np.array_equal(compiled, scorer._emissions_numpy(rows, lengths))
    np.testing.assert_allclose(compiled, _reference_emissions(extractor, batch, scorer.weights)[0],
                               rtol=0, atol=1e-9)


# --- the new-type path on awkward text ---------------------------------------------------------------
# The scorer handles a batch's new types together: it joins their texts with NUL to lower-case, shape
# and encode them in one call, marks non-ASCII shapes with U+FFFF, and finds prefixes and suffixes by
# their code points packed into integers (up to 21 bits each). So the texts below hold NUL, U+FFFF,
# the capital sigma (whose lower case depends on the next character: Unicode SpecialCasing, Final_Sigma),
# a letter outside the Basic Multilingual Plane, a CJK character and Latin-1 letters, and the specs
# take affixes too long to pack. References as above: the plain extractor (Python's str methods, i.e.
# the Unicode character database) and scipy's sparse product.

WIDE_ALPHABET = "aZ09-.:" + "\x00\uffffΣσüİ中𝔘"
wide_text = st.one_of(st.text(WIDE_ALPHABET, min_size=1, max_size=12), st.sampled_from(POOL + ["ΑΣ", "ΑΣ.b"]))


@st.composite
def wide_batches(draw):
    lines = []
    for _ in range(draw(st.integers(1, 5))):
        texts = draw(st.lists(wide_text, min_size=0, max_size=8))
        lines.append((texts, draw(st.lists(st.sampled_from(KINDS), min_size=len(texts), max_size=len(texts)))))
    return lines


@st.composite
def long_affix_specs(draw):
    cfg = draw(spec_dicts())
    # up to 10 characters: past what fits in the packed integer for ASCII (8) and for wide code points (2)
    cfg["token"]["prefix_lengths"] = sorted(draw(st.sets(st.integers(1, 10), min_size=1, max_size=4)))
    cfg["token"]["suffix_lengths"] = sorted(draw(st.sets(st.integers(1, 10), min_size=1, max_size=4)))
    cfg["token"]["groups"] = sorted(set(cfg["token"]["groups"]) | {"prefix", "suffix"})
    return cfg


@SETTINGS
@given(long_affix_specs(), st.lists(wide_batches(), min_size=1, max_size=3), st.integers(1, 40),
       st.integers(0, 2**32 - 1))
def test_emission_scorer_on_wide_text_equals_sparse_product(cfg, batch_list, cache_size, seed):
    extractor = FeatureExtractor(FeatureSpec.from_dict(cfg))
    vocabulary = extractor.fit([s for b in batch_list for s in b])
    first = batch_list[0]
    # the extractor itself against the plain reference (Python's str methods) on this text
    assert decoded_rows(extractor.transform(first)[0], vocabulary) == \
        [sorted(row) for texts, kinds in first for row in ref_features(texts, kinds, cfg)]
    weights = np.random.default_rng(seed).normal(size=(extractor.n_features, 3))
    scorer = EmissionScorer(extractor, weights, cache_size=cache_size)
    for batch in batch_list + batch_list:
        expected, lengths = _reference_emissions(extractor, batch, weights)   # scipy's sparse product
        np.testing.assert_allclose(scorer.emissions(scorer.type_rows(*_flat(batch)), lengths), expected,
                                   rtol=0, atol=1e-9)


def test_emission_scorer_on_final_sigma_and_nul():
    # "ΑΣ" lower-cases to "ας" (final sigma) alone but "ασ" before a letter (Unicode SpecialCasing,
    # Final_Sigma; Python's str.lower follows it), so a batch's texts must not be lower-cased as one
    # string with anything after them. A NUL inside a text must not split it.
    cfg = dict(FULL_SPEC, token=dict(FULL_SPEC["token"], max_value_chars=10))
    lines = [(["ΑΣ", "ΑΣb", "a\x00b", "ΑΣ"], ["word", "word", "word", "ident"]), (["b", "ΑΣ"], ["word"] * 2)]
    extractor = FeatureExtractor(FeatureSpec.from_dict(cfg))
    extractor.fit(lines)
    assert "lower=ας" in extractor.vocabulary and "lower=ασb" in extractor.vocabulary   # Python's str.lower
    weights = np.random.default_rng(11).normal(size=(extractor.n_features, 4))
    scorer = EmissionScorer(extractor, weights)
    for sub in (lines, lines[::-1]):
        expected, lengths = _reference_emissions(extractor, sub, weights)           # scipy's sparse product
        np.testing.assert_allclose(scorer.emissions(scorer.type_rows(*_flat(sub)), lengths), expected,
                                   rtol=0, atol=1e-9)


@SETTINGS
@given(st.lists(st.text(WIDE_ALPHABET + "bcdXY_/@=", min_size=20, max_size=300), min_size=1, max_size=6),
       st.integers(1, 8))
def test_emission_scorer_long_texts_with_two_kinds(texts, cache_size):
    # Long texts (past the value cut, some past the length the table keeps) each come with two kinds,
    # twice in one batch; the table must keep the kinds apart and stay bounded.
    extractor = FeatureExtractor(FeatureSpec.from_dict(FULL_SPEC))
    batch = [(texts, ["word"] * len(texts)), (texts[::-1], ["hex"] * len(texts)), (texts, ["word"] * len(texts))]
    extractor.fit(batch)
    weights = np.random.default_rng(len(texts)).normal(size=(extractor.n_features, 3))
    scorer = EmissionScorer(extractor, weights, cache_size=cache_size)
    for _ in range(2):
        expected, lengths = _reference_emissions(extractor, batch, weights)         # scipy's sparse product
        np.testing.assert_allclose(scorer.emissions(scorer.type_rows(*_flat(batch)), lengths), expected,
                                   rtol=0, atol=1e-9)
    assert scorer.n_rows <= max(cache_size, 3 * len(texts)) + 1


@SETTINGS
@given(long_affix_specs(), st.lists(wide_batches(), min_size=1, max_size=2), st.integers(0, 2**32 - 1))
def test_compiled_type_scores_equal_the_numpy_code(cfg, batch_list, seed):
    # The compiled affix lookup finds the same rows as the numpy search, and the compiled block sums add
    # in the numpy code's order: every token's scores are equal bit for bit, though the compiled type
    # index may number the types in another order than the dicts. (Both equal scipy's product, above.)
    from streamtag import crf
    from streamtag.features import _feature_kernels

    assert _feature_kernels() is not None      # numba is a dependency: the kernels must load
    extractor = FeatureExtractor(FeatureSpec.from_dict(cfg))
    extractor.fit([s for b in batch_list for s in b])
    weights = np.random.default_rng(seed).normal(size=(extractor.n_features, 3))
    compiled, plain = EmissionScorer(extractor, weights), EmissionScorer(extractor, weights)
    switch = crf.USE_KERNELS
    for batch in batch_list:
        rows = compiled.type_rows(*_flat(batch))
        crf.USE_KERNELS = False
        try:
            plain_rows = plain.type_rows(*_flat(batch))
        finally:
            crf.USE_KERNELS = switch
        assert np.array_equal(compiled.table[rows], plain.table[plain_rows])


@pytest.mark.parametrize("texts", [["sshd", "", "Host-7", "é"], ["a\x00b", "c", ""], ["\udcff", "naïve", "\x00"], []])
def test_joined_bytes_cut_each_text_as_python_encodes_it(texts):
    # Python's own str.encode (UTF-8, surrogates passed: the codec's "surrogatepass" handler) is the
    # reference for each text's bytes, with and without a NUL inside a text (the joined fast path and
    # the one-by-one fallback).
    from streamtag.features import _feature_kernels, _joined_bytes

    data, starts, ends = _joined_bytes(texts, _feature_kernels().split_at_nul)
    assert [bytes(data[a:b]) for a, b in zip(starts.tolist(), ends.tolist())] == \
        [text.encode("utf-8", "surrogatepass") for text in texts]


def test_value_lookup_tags_agree_with_the_kernels():
    # features keeps its own copy of the tags so that it need not import numba; both must agree.
    from streamtag import feature_kernels, features

    assert (features.LOOKUP_WORD, features.LOOKUP_CUT, features.LOOKUP_SHAPE, features.LOOKUP_COLLAPSED) == \
        (feature_kernels.LOOKUP_WORD, feature_kernels.LOOKUP_CUT, feature_kernels.LOOKUP_SHAPE,
         feature_kernels.LOOKUP_COLLAPSED)


# ------------------------------------------------------------------------------------------------
# type rows by the tokenizer's keys
# ------------------------------------------------------------------------------------------------


def _keyed_pair(cache_size):
    """Two scorers of one model over FULL_SPEC with random weights: one to be given keys, one not."""
    from streamtag.demo.generate import generate_stream
    from streamtag.tokenize import BatchTokenizer

    lines = [record["text"] for record in generate_stream(1500, seed=21)]
    tokenizer = BatchTokenizer()
    extractor = FeatureExtractor(FeatureSpec.from_dict(FULL_SPEC))
    batch = tokenizer.tokenize_lines(lines[:300])
    extractor.fit([(line.texts, line.kinds) for line in batch.per_line()])
    weights = np.random.default_rng(11).normal(size=(extractor.n_features, 5))
    return lines, extractor, weights, [EmissionScorer(extractor, weights, cache_size=cache_size) for _ in range(2)]


def _assert_same_scores(keyed, keyed_rows, plain, plain_rows, lengths):
    """Reference: the lookup by text and kind (type_rows without keys), itself checked against the
    sparse product X @ W above. The rows may differ, their scores may not, by a single bit."""
    assert np.array_equal(keyed.table[keyed_rows], plain.table[plain_rows])
    assert np.array_equal(keyed.emissions(keyed_rows, lengths), plain.emissions(plain_rows, lengths))


# Pieces over 256 characters, of different kinds and shapes: never cached by the tokenizer, so their
# rows are reused by the next batch's and must never be keys.
LONG_PIECES = ["x" * 300, "7" * 300, "Ab" * 150, "q7" * 150, "Z" * 300]


# Non-ASCII texts (scored the Python way), a lone surrogate, a NUL, a text holding the value cut:
# invented words.
ODD_LINE = "naïve Ωmega-7 grüße \ud800 a\x00b ÉCLAIR-09 " + "m" * 40


@pytest.mark.parametrize("kernels", [True, False])
@pytest.mark.parametrize("pieces_cached", [120, 100_000])
@pytest.mark.parametrize("lazy", [False, True])
def test_type_rows_by_key_equal_type_rows_by_text(monkeypatch, kernels, pieces_cached, lazy):
    # Invented demo lines through a small type table, which starts afresh many times, and a small
    # or a large tokenizer cache (many generations, or one): keys of an older generation or an
    # older table must never be used. Given the tokenizer's lazy texts (code points, no str) or
    # lists; the reference is given lists.
    from streamtag import crf
    from streamtag.tokenize import BatchTokenizer

    monkeypatch.setattr(crf, "USE_KERNELS", kernels)
    lines, extractor, weights, (keyed, plain) = _keyed_pair(cache_size=180)
    tokenizer = BatchTokenizer(cache_size=pieces_cached)
    generations, epoch = set(), keyed._epoch
    for start in range(0, len(lines), 75):
        long_line = f"payload {LONG_PIECES[start // 75 % len(LONG_PIECES)]} end"
        batch = tokenizer.tokenize_lines(lines[start : start + 75] + [long_line, ODD_LINE], lazy=lazy)
        generations.add(batch.generation)
        rows = keyed.type_rows(batch.texts, batch.kinds, batch.keys, batch.generation)
        texts, kinds = list(batch.texts), list(batch.kinds)
        _assert_same_scores(keyed, rows, plain, plain.type_rows(texts, kinds), batch.counts)
        if start == 0:  # and against the sparse product itself, once
            expected, lengths = _reference_emissions(extractor, [(t.texts, t.kinds) for t in batch.per_line()],
                                                     weights)
            np.testing.assert_allclose(keyed.emissions(rows, lengths), expected, rtol=0, atol=1e-9)
    assert keyed._epoch - epoch >= 4 and (len(generations) >= 4 if pieces_cached < 1000 else len(generations) == 1)
    assert (keyed._row_of_key >= 0).sum() > 0  # keys were recorded (and used, batch after batch)


@pytest.mark.parametrize("lazy", [False, True])
def test_table_starting_afresh_while_placing_the_new_types(lazy):
    # Batch 2 repeats batch 1's tokens (known by key) and brings more new types than the table has
    # room for: the table starts afresh during the lookup of the new ones, which orphans the rows
    # taken by key; they must be looked up again. Then other lines start it afresh once more (given
    # with keys, or without), and the first lines' keys, still of the tokenizer's generation, point
    # into a table gone by.
    from streamtag.tokenize import BatchTokenizer

    _, extractor, weights, (keyed, plain) = _keyed_pair(cache_size=10)
    tokenizer = BatchTokenizer()
    first = ["relay-07 down at 12:00:01 code 503", "kestrel login failed"]  # invented host and user
    second = first + ["brindle-04 vault-02 up since 09:15:00 for 17 days"]
    other = ["moth-11 sent 4096 bytes to 198.51.100.23 via tunnel-5 in 0.25 s"]  # RFC 5737 address
    unkeyed = ["finch-19 wrote 77 rows to ledger-3 at 10:42:07 in 3.5 s"]  # invented names
    fresh_starts = []
    for lines in (first, second, second, first, other, first, second, unkeyed, first):
        batch = tokenizer.tokenize_lines(lines, lazy=lazy)
        epoch = keyed._epoch
        with_keys = (batch.keys, batch.generation) if lines is not unkeyed else ()
        rows = keyed.type_rows(batch.texts, batch.kinds, *with_keys)
        _assert_same_scores(keyed, rows, plain, plain.type_rows(list(batch.texts), list(batch.kinds)), batch.counts)
        fresh_starts.append(keyed._epoch - epoch)
    assert fresh_starts[1] > 0 and fresh_starts[7] > 0  # mid-lookup, and in a call without keys


def test_type_rows_by_key_of_another_generation_are_not_used():
    # The same keys under a new generation stand for other tokens (the tokenizer renumbered its rows).
    _, extractor, weights, (keyed, plain) = _keyed_pair(cache_size=100)
    keys = np.array([0, 1, -1])
    for generation, texts in ((1, ["alpha", "beta", "x" * 300]), (2, ["beta", "alpha", "7"]), (2, ["beta", "alpha", "7"])):
        kinds = ["word", "word", "ident" if texts[2] == "7" else "word"]
        rows = keyed.type_rows(texts, kinds, keys, generation)
        _assert_same_scores(keyed, rows, plain, plain.type_rows(texts, kinds), np.array([3]))
    with pytest.raises(DataError):
        keyed.type_rows(["a"], ["word"], np.array([0, 1]), 3)
    with pytest.raises(DataError):
        keyed.type_rows(["a"], ["word"], np.array([-2]), 3)
