"""Tests for the demo data generator (streamtag.demo.generate) and its invented world."""

from __future__ import annotations

import ipaddress
import json
import os
import re
import stat
import subprocess
import sys
from collections import Counter
from datetime import datetime
from pathlib import Path

import pytest

from streamtag.demo import generate, scenario
from streamtag.errors import StreamtagError
from seqeval.metrics.sequence_labeling import get_entities

from streamtag.spans import char_to_token_spans, spans_to_bio
from streamtag.tokenize import tokenize

REPO = Path(__file__).resolve().parents[1]
REQUIRED_TYPES = ("host", "netaddr", "account", "service", "filepath", "errcode", "person", "place", "org")
SIZES = {"train": 4000, "dev": 500, "test": 1000}   # the sizes write_demo_data uses by default


@pytest.fixture(scope="module")
def splits() -> dict[str, list[dict]]:
    return {split: generate.generate_split(split, n, seed=7) for split, n in SIZES.items()}


@pytest.fixture(scope="module")
def all_examples(splits) -> list[dict]:
    return [example for examples in splits.values() for example in examples]


def span_texts(examples, labels) -> list[str]:
    return [ex["text"][s["start"]:s["end"]] for ex in examples for s in ex["spans"] if s["label"] in labels]


# ------------------------------------------------------------------------------- determinism -------

def _write_and_read(out: Path, seed: int) -> dict[str, bytes]:
    paths = generate.write_demo_data(out, seed=seed, n_train=300, n_dev=60, n_test=100, n_stream=200)
    return {name: Path(path).read_bytes() for name, path in paths.items()}


def test_same_seed_gives_identical_bytes_and_another_seed_differs(tmp_path):
    # Reproducible data sets from a seed: common practice for published splits.
    first = _write_and_read(tmp_path / "a", seed=3)
    second = _write_and_read(tmp_path / "b", seed=3)
    other = _write_and_read(tmp_path / "c", seed=4)
    assert first == second
    assert set(first) >= {"train", "dev", "test", "stream"}
    for name in ("train", "dev", "test", "stream"):
        assert first[name] != other[name], name


def _run_cli(out: Path, hash_seed: str) -> dict[str, bytes]:
    env = dict(os.environ, PYTHONHASHSEED=hash_seed, PYTHONPATH=str(REPO))
    completed = subprocess.run(
        [sys.executable, "-m", "streamtag.demo.generate", "--out", str(out), "--seed", "11",
         "--train", "400", "--dev", "50", "--test", "100", "--stream", "150"],
        env=env, capture_output=True, text=True, check=False, cwd=REPO)
    assert completed.returncode == 0, completed.stderr
    return {path.name: path.read_bytes() for path in sorted(out.iterdir())}


def test_output_does_not_depend_on_string_hash_seed(tmp_path):
    # PYTHONHASHSEED randomises str hashes and so set iteration order (Python docs, "Command line
    # and environment"); the files must not change with it.
    one = _run_cli(tmp_path / "h1", "1")
    two = _run_cli(tmp_path / "h2", "987654")
    assert sorted(one) == ["dev.jsonl", "stream.log", "stream_truth.jsonl", "test.jsonl", "train.jsonl"]
    assert one == two


def test_files_are_private(tmp_path):
    # Files holding log-like personal data are created mode 0600 (POSIX permission bits via stat).
    paths = generate.write_demo_data(tmp_path / "out", n_train=20, n_dev=5, n_test=5, n_stream=10)
    for path in paths.values():
        assert stat.S_IMODE(os.stat(path).st_mode) == 0o600, path


def test_written_files_are_labelled_json_lines(tmp_path):
    # JSON Lines: one JSON text per line, UTF-8 (jsonlines.org, common practice); parsed with the
    # standard library json module as reference.
    paths = generate.write_demo_data(tmp_path / "out", n_train=50, n_dev=10, n_test=10, n_stream=30)
    records = [json.loads(line) for line in paths["train"].read_text(encoding="utf-8").splitlines()]
    assert len(records) == 50
    assert all(set(record) <= {"text", "spans", "weight"} and "spans" in record for record in records)
    assert [(r["text"], r["spans"]) for r in records] == [
        (e["text"], e["spans"]) for e in generate.generate_split("train", 50, seed=7)]
    stream_lines = paths["stream"].read_text(encoding="utf-8").split("\n")
    assert stream_lines[-1] == "" and len(stream_lines) == 31


def test_unwritable_output_is_one_line_error(tmp_path):
    blocker = tmp_path / "file"
    blocker.write_text("x")
    with pytest.raises(StreamtagError) as caught:
        generate.write_demo_data(blocker / "sub", n_train=1, n_dev=1, n_test=1, n_stream=1)
    assert "\n" not in str(caught.value)


# ------------------------------------------------------------------------------- spans -------------

def test_spans_are_within_bounds_sorted_and_trimmed(all_examples):
    # Span = half-open character interval [start, end), non-overlapping (the chunk definition of
    # the CoNLL-2003 shared task scorer: one label per token, common practice).
    checked = 0
    for example in all_examples:
        text, previous_end = example["text"], 0
        assert "\n" not in text and "\r" not in text
        for span in example["spans"]:
            start, end = span["start"], span["end"]
            assert previous_end <= start < end <= len(text), example
            piece = text[start:end]
            assert piece and piece == piece.strip(), example
            assert span["label"] in REQUIRED_TYPES
            previous_end = end
            checked += 1
    assert checked > 15_000


_PLAIN_SPLIT = re.compile(r"[^\s()\[\]{}<>\"'`,=]+")


def _plain_token_edges(text: str) -> tuple[set[int], set[int]]:
    """Split on white space, brackets, quotes, commas and '='; cut trailing . , : ; ! ? off a token."""
    starts, ends = set(), set()
    for match in _PLAIN_SPLIT.finditer(text):
        core = match.group().rstrip(".,:;!?")
        starts.add(match.start())
        ends.add(match.end())
        if core:
            ends.add(match.start() + len(core))
            starts.add(match.start() + len(core))
    return starts, ends


def test_spans_sit_on_plain_token_boundaries(all_examples):
    # The plain log tokenizing rule (common practice): an entity never starts or ends inside a token.
    for example in all_examples:
        starts, ends = _plain_token_edges(example["text"])
        for span in example["spans"]:
            assert span["start"] in starts and span["end"] in ends, (example["text"], span)


def test_spans_sit_on_streamtag_token_boundaries(all_examples):
    # Integration with the project's tokenizer: a span that cuts a token would be lost in training.
    misaligned = 0
    for example in all_examples:
        tokens = tokenize(example["text"])
        spans = [(s["start"], s["end"], s["label"]) for s in example["spans"]]
        misaligned += char_to_token_spans(spans, tokens.starts, tokens.ends)[1]
    assert misaligned == 0


# ------------------------------------------------------------------------------- formats -----------

def test_json_lines_parse_and_entities_lie_inside_string_values(all_examples):
    # RFC 8259 JSON, Python's json module as reference parser.
    json_lines = [ex for ex in all_examples if ex["text"].startswith("{")]
    assert len(json_lines) > 300
    for example in json_lines:
        document = json.loads(example["text"])
        assert isinstance(document, dict)
        values = [value for value in document.values() if isinstance(value, str)]
        for span in example["spans"]:
            raw = example["text"][span["start"]:span["end"]]
            decoded = json.loads(f'"{raw}"')   # the span covers the escaped form inside the string
            assert any(decoded in value for value in values), (example["text"], raw)


# RFC 5424 section 6: HEADER = PRI VERSION SP TIMESTAMP SP HOSTNAME SP APP-NAME SP PROCID SP MSGID,
# then SP STRUCTURED-DATA [SP MSG].
_RFC5424 = re.compile(
    r"<(?P<pri>\d{1,3})>(?P<version>[1-9]\d{0,2}) (?P<ts>\S+) (?P<host>\S+) (?P<app>\S+) (?P<procid>\S+) "
    r"(?P<msgid>\S+) (?P<sd>-|(?:\[[^\]]*\])+)(?: (?P<msg>.*))?$", re.DOTALL)
# RFC 5424 section 6.2.3 (after RFC 3339 section 5.6): FULL-DATE "T" FULL-TIME, TIME-SECFRAC 1*6DIGIT.
_RFC5424_TIMESTAMP = re.compile(r"\d{4}-\d{2}-\d{2}T\d{2}:\d{2}:\d{2}(\.\d{1,6})?(Z|[+-]\d{2}:\d{2})")
# RFC 5424 section 6.3: SD-ELEMENT = "[" SD-ID *(SP SD-PARAM) "]", SD-PARAM = PARAM-NAME "=" %d34 value %d34.
_SD_ELEMENT = re.compile(r'\[([^ =\]"]{1,32})((?: [^ =\]"]{1,32}="[^"\\\]]*")*)\]')


def _printusascii(field: str) -> bool:
    return all(33 <= ord(char) <= 126 for char in field)   # RFC 5424 section 6: PRINTUSASCII %d33-126


def test_rfc5424_headers_follow_section_6(all_examples):
    lines = [ex for ex in all_examples if re.match(r"<\d+>\d+ ", ex["text"])]
    assert len(lines) > 300
    for example in lines:
        match = _RFC5424.match(example["text"])
        assert match, example["text"]
        assert 0 <= int(match["pri"]) <= 191                  # section 6.2.1: PRIVAL 0..191
        assert match["version"] == "1"                        # section 6.2.2: VERSION 1
        assert _RFC5424_TIMESTAMP.fullmatch(match["ts"]), match["ts"]
        datetime.fromisoformat(match["ts"].replace("Z", "+00:00"))   # Python's datetime as reference
        for name, limit in (("host", 255), ("app", 48), ("procid", 128), ("msgid", 32)):   # section 6.2.4-7
            assert 1 <= len(match[name]) <= limit and _printusascii(match[name]), (name, example["text"])
        if match["sd"] != "-":
            assert "".join(m.group() for m in _SD_ELEMENT.finditer(match["sd"])) == match["sd"], match["sd"]
        # The header's HOSTNAME and APP-NAME fields carry the host (or address) and service labels.
        labels_at = {s["start"]: s["label"] for s in example["spans"]}
        if match["host"] != "-":
            assert labels_at.get(match.start("host")) in ("host", "netaddr")
        assert labels_at.get(match.start("app")) == "service"


def test_bsd_syslog_timestamps_follow_rfc3164(all_examples):
    # RFC 3164 section 4.1.2: TIMESTAMP "Mmm dd hh:mm:ss", a day below 10 padded with a space.
    pattern = re.compile(r"(?:<(\d{1,3})>)?([A-Z][a-z]{2} [ 1-3]\d \d{2}:\d{2}:\d{2}) \S+ \S+")
    lines = [ex["text"] for ex in all_examples if pattern.match(ex["text"])]
    assert len(lines) > 300
    for text in lines:
        match = pattern.match(text)
        datetime.strptime(match[2], "%b %d %H:%M:%S")   # Python's strptime as reference
        assert match[1] is None or 0 <= int(match[1]) <= 191


# ------------------------------------------------------------------------------- addresses ---------

# Documentation ranges (RFC 5737 section 3, RFC 3849 section 2) and private ranges (RFC 1918 section 3).
ALLOWED_NETWORKS = [ipaddress.ip_network(n) for n in (
    "192.0.2.0/24", "198.51.100.0/24", "203.0.113.0/24", "2001:db8::/32",
    "10.0.0.0/8", "172.16.0.0/12", "192.168.0.0/16")]


def _parse_netaddr(text: str):
    if "/" in text:
        return ipaddress.ip_network(text)
    if text.count(":") == 1:                                # IPv4 address:port
        address, port = text.split(":")
        assert 0 < int(port) <= 65535                       # RFC 793: 16-bit port number
        return ipaddress.ip_network(address)
    return ipaddress.ip_network(text)


def test_netaddr_spans_parse_and_lie_in_reserved_ranges(all_examples):
    # Python's ipaddress module as reference parser.
    texts = span_texts(all_examples, {"netaddr"})
    assert len(texts) > 1000
    kinds = Counter()
    for text in texts:
        network = _parse_netaddr(text)
        assert any(network.version == allowed.version and network.subnet_of(allowed)
                   for allowed in ALLOWED_NETWORKS), text
        kinds["v6" if network.version == 6 else "cidr" if "/" in text else "port" if ":" in text else "v4"] += 1
    assert set(kinds) == {"v4", "v6", "cidr", "port"}


_DNS_LABEL = re.compile(r"[a-z0-9](?:[a-z0-9-]{0,61}[a-z0-9])?")   # RFC 1123 section 2.1 host name label
_RESERVED_TLDS = ("example", "test", "invalid")                   # RFC 2606 section 2, RFC 6761 section 6


def test_fqdn_hosts_and_mail_domains_use_reserved_names(all_examples):
    hosts = [re.sub(r":\d+$", "", text) for text in span_texts(all_examples, {"host"})]
    fqdns = [host.lower() for host in hosts if "." in host]   # DNS names are case-insensitive (RFC 4343)
    assert len(fqdns) > 500
    for name in fqdns:
        labels = name.split(".")
        assert labels[-1] in _RESERVED_TLDS, name
        assert all(_DNS_LABEL.fullmatch(label) for label in labels), name
    mail_domains = [t.rsplit("@", 1)[1].lower() for t in span_texts(all_examples, {"account"}) if "@" in t]
    assert mail_domains and all(domain.split(".")[-1] in _RESERVED_TLDS for domain in mail_domains)


def test_urls_are_unlabelled_and_use_reserved_names(all_examples):
    # RFC 3986 URIs are left unlabelled; their hosts are reserved names too (RFC 2606).
    for example in all_examples:
        for match in re.finditer(r"https?://([^/\s\"]+)/", example["text"]):   # host complete (not cut)
            assert match[1].lower().rsplit(".", 1)[-1] in _RESERVED_TLDS
            assert not any(s["start"] < match.end() and match.start() < s["end"] for s in example["spans"])


# ------------------------------------------------------------------------------- difficulty -------

def test_test_names_are_mostly_unseen_in_training(splits):
    # Held-out names measure generalisation rather than memorisation (common practice in NER
    # evaluation, e.g. the unseen-entity split of WNUT-2017).
    seen = set(span_texts(splits["train"], set(REQUIRED_TYPES)))
    test_names = set(span_texts(splits["test"], {"person", "host", "account"}))
    unseen_share = sum(name not in seen for name in test_names) / len(test_names)
    assert unseen_share >= 0.5, unseen_share


# ------------------------------------------------------------------------------- held-out shapes --
# Evaluating on templates the model never trained on measures generalisation to new line layouts
# (held-out / out-of-distribution test data, common practice in NER evaluation).

@pytest.fixture(scope="module")
def detailed() -> dict[str, list]:
    return {split: generate.generate_split_detailed(split, n, seed=7) for split, n in SIZES.items()}


def test_a_quarter_of_the_shapes_is_held_out():
    held_out = generate.held_out_shapes()
    assert len(set(held_out)) == len(held_out)
    assert 0.25 <= len(held_out) / generate.shape_count() <= 0.30
    families = {shape.split("/")[0] for shape in held_out}
    assert families == {family.name for family in generate.FAMILIES}


@pytest.mark.parametrize("seed", [7, 3])
def test_train_never_contains_a_held_out_shape(seed):
    held_out = set(generate.held_out_shapes())
    train_shapes = {example.shape for example in generate.generate_split_detailed("train", 4000, seed)}
    assert not train_shapes & held_out
    assert len(train_shapes) >= 300


def test_dev_and_test_draw_a_third_of_their_lines_from_held_out_shapes(detailed):
    held_out = set(generate.held_out_shapes())
    for split in ("dev", "test"):
        examples = detailed[split]
        from_held_out = [example for example in examples if example.shape in held_out]
        assert 0.27 <= len(from_held_out) / len(examples) <= 0.40, split
        # many different held-out shapes, and the shared shapes are still there too
        assert len({example.shape for example in from_held_out}) >= (150 if split == "test" else 80), split
        assert len({example.shape for example in examples} - held_out) >= (300 if split == "test" else 150)


def _held_out_only_phrases() -> list[str]:
    """Literal pieces (12+ characters) of held-out templates that no shared template contains."""
    shared_text, held_out_literals = [], []
    for family in generate.FAMILIES:
        for index, template in enumerate(family.headers + family.messages):
            if not isinstance(template, str):          # a JSON layout: no held-out one exists
                continue
            held_out = (index >= family.shared_headers if index < len(family.headers)
                        else index - len(family.headers) >= family.shared_messages)
            literals = [part.strip().lower() for part in re.split(r"\{[A-Za-z_0-9]+\}", template)]
            (held_out_literals if held_out else shared_text).extend(literals)
    joined = "\n".join(shared_text)
    return sorted({piece for piece in held_out_literals if len(piece) >= 12 and piece not in joined})


def test_held_out_wording_never_reaches_train_text(splits):
    # Checks the lines themselves, not only the shape ids: a held-out phrase in a train line would
    # leak the layout (lower-cased: odd-case noise may change the case).
    phrases = _held_out_only_phrases()
    assert len(phrases) >= 15
    train_text = "\n".join(example["text"].lower() for example in splits["train"])
    test_text = "\n".join(example["text"].lower() for example in splits["test"])
    assert [phrase for phrase in phrases if phrase in train_text] == []
    assert sum(phrase in test_text for phrase in phrases) >= 0.8 * len(phrases)


def _token_tags(example: dict) -> list[str]:
    tokens = tokenize(example["text"])
    char_spans = [(s["start"], s["end"], s["label"]) for s in example["spans"]]
    token_spans, misaligned = char_to_token_spans(char_spans, tokens.starts, tokens.ends)
    assert misaligned == 0
    return spans_to_bio(token_spans, len(tokens.texts))


def test_test_split_has_adjacent_entities_of_one_type(splits):
    # Two chunks of one type with nothing between them: IOB2 starts the second with B-
    # (Tjong Kim Sang & Veenstra 1999, "Representing Text Chunks"); seqeval's chunker is the
    # reference that must find both chunks.
    adjacent = Counter()
    for example in splits["test"]:
        tags = _token_tags(example)
        chunks = get_entities(tags)
        assert len(chunks) == len(example["spans"]), example["text"]
        for (label, _, end), (next_label, start, next_end) in zip(chunks, chunks[1:]):
            if label == next_label and start == end + 1:
                adjacent["multi-token" if next_end > start else "one-token"] += 1
    assert adjacent["multi-token"] >= 15 and adjacent["one-token"] >= 15, adjacent


def test_test_split_has_the_awkward_cases(splits):
    test = splits["test"]
    people = span_texts(test, {"person"})
    lower_people = [name for name in people if name == name.lower()]
    assert len(lower_people) >= 0.05 * len(people)
    assert any(" " in name for name in lower_people)             # full names typed in lower case
    places = span_texts(test, {"place"})
    site_services = set(scenario.PLACE_NAMED_SERVICES)
    assert sum(place.lower() == place and place in site_services for place in places) >= 3
    services = span_texts(test, {"service"})
    assert sum(service.lower() in site_services and service[0].isupper() for service in services) >= 5
    chat_orgs = [example for example in test if re.match(r"(<|\[\d|\d\d:\d\d <|\(\d)", example["text"])
                 and any(s["label"] == "org" for s in example["spans"])]
    assert len(chat_orgs) >= 5


def test_pools_of_different_splits_are_disjoint():
    # The name pools themselves share nothing across splits (invented data, checked directly).
    for attribute in ("given_names", "family_names", "people", "namesake_hosts", "host_stems"):
        pools = [set(getattr(scenario.POOLS[split], attribute)) for split in scenario.SPLITS]
        assert not (pools[0] & pools[1] or pools[0] & pools[2] or pools[1] & pools[2]), attribute


def test_same_word_is_a_host_in_one_line_and_a_person_in_another(splits):
    for split, examples in splits.items():
        hosts = set(span_texts(examples, {"host"}))
        people_words = {word for text in span_texts(examples, {"person"}) for word in text.split()}
        assert hosts & people_words, split
    services = {text.lower() for text in span_texts(splits["train"], {"service"})}
    places = {text.lower() for text in span_texts(splits["train"], {"place"})}
    assert services & places


def test_every_entity_type_appears_in_every_split(splits):
    for split, examples in splits.items():
        labels = Counter(span["label"] for example in examples for span in example["spans"])
        assert set(labels) == set(REQUIRED_TYPES), (split, labels)
        assert min(labels.values()) >= 0.01 * len(examples), (split, labels)


def test_entity_type_table_lists_the_label_set():
    assert tuple(entity.name for entity in scenario.ENTITY_TYPES) == REQUIRED_TYPES
    assert all(entity.description and entity.example for entity in scenario.ENTITY_TYPES)


def test_noise_reaches_a_share_of_lines():
    examples = generate.generate_split_detailed("train", 2000, seed=5)
    noisy = [example for example in examples if example.noise]
    assert 0.08 <= len(noisy) / len(examples) <= 0.25
    assert {kind for example in noisy for kind in example.noise} == set(generate.NOISE_KINDS)
    spaced = [e for e in noisy if "space" in e.noise]
    assert sum(bool(re.search(r"\S(  |\t)\S", e.text)) for e in spaced) >= 0.8 * len(spaced)


def test_there_are_hundreds_of_shapes_and_they_are_used(splits):
    assert generate.shape_count() >= 300
    shapes = {example.shape for example in generate.generate_split_detailed("train", 4000, seed=7)}
    assert len(shapes) >= 300
    families = {shape.split("/")[0] for shape in shapes}
    assert families == {"syslog5424", "syslogbsd", "app", "json", "kv", "chat", "ticket", "alert", "audit",
                        "web"}


def test_splits_differ_and_generation_is_a_pure_function_of_its_arguments():
    assert generate.generate_split("dev", 50, seed=1) == generate.generate_split("dev", 50, seed=1)
    assert generate.generate_split("dev", 50, seed=1) != generate.generate_split("test", 50, seed=1)
    assert generate.generate_split("train", 0, seed=1) == []


@pytest.mark.parametrize("call", [
    lambda: generate.generate_split("validation", 10, 1),
    lambda: generate.generate_split("train", -1, 1),
    lambda: generate.generate_stream(10, 1, doubtful_share=1.5),
])
def test_bad_arguments_raise_one_line_errors(call):
    with pytest.raises(StreamtagError) as caught:
        call()
    assert "\n" not in str(caught.value)


# ------------------------------------------------------------------------------- stream -----------

def test_stream_has_the_requested_doubtful_share():
    lines = generate.generate_stream(500, seed=2, doubtful_share=0.1)
    assert len(lines) == 500
    assert sum(line["doubtful"] for line in lines) == 50
    assert all(set(line) == {"text", "doubtful"} and line["text"].strip() for line in lines)
    assert all("\n" not in line["text"] and "\r" not in line["text"] for line in lines)
    assert generate.generate_stream(500, seed=2, doubtful_share=0.1) == lines
    assert not any(line["doubtful"] for line in generate.generate_stream(40, seed=2, doubtful_share=0.0))
    assert all(line["doubtful"] for line in generate.generate_stream(40, seed=2, doubtful_share=1.0))


def test_doubtful_stream_lines_use_unseen_names_more_than_plain_ones(splits):
    # The doubtful lines are built from held-out names and shapes: fewer of their words occur in
    # the training data than for the plain lines (a vocabulary out-of-training rate, common practice).
    train_words = {word.lower() for example in splits["train"] for word in re.findall(r"[A-Za-z]{4,}", example["text"])}
    lines = generate.generate_stream(1000, seed=9, doubtful_share=0.2)

    def unseen_rate(doubtful: bool) -> float:
        words = [w.lower() for line in lines if line["doubtful"] == doubtful
                 for w in re.findall(r"[A-Za-z]{4,}", line["text"])]
        return sum(word not in train_words for word in words) / len(words)

    assert unseen_rate(True) > 2 * unseen_rate(False)
