"""Feature extraction throughput on log-like lines (a benchmark, not a test).

Run:  .venv/bin/python tests/bench/bench_features.py [--lines N] [--batch B] [--repeat R]

Two workloads, both invented syslog-style lines:
  repeated  a small pool of distinct lines cycled many times: nearly every token type is cached
  fresh     every line with new pids, ports, addresses, timestamps and request ids: the cache misses
            on those tokens as it would on a live log
Tokens come from streamtag.tokenize when it is importable, otherwise from a small regex split.
Prints tokens per CPU second for fit and for transform (cold cache on the first pass, warm after),
and for the whole path tokenize + features + emissions + Viterbi with random weights (19 labels, the
size of a nine-type BIO label set) when streamtag.tokenize and streamtag.crf are importable. Then the
path the tagger takes (CPU us per line, best of R, after warm-up lines): BatchTokenizer with lazy
token texts, EmissionScorer.type_rows with the tokenizer's keys, EmissionScorer.emissions (checked
once against transform(...) @ W).
"""

from __future__ import annotations

import argparse
import random
import re
import time

from streamtag.features import FeatureExtractor, FeatureSpec

HOSTS = ["web-03", "db-core-1", "edge7.quillnet.test", "cache-2", "relay-north", "vault-a9"]
SERVICES = ["sshd", "cron", "vellumd", "authd", "queue-worker", "zeldad", "postmux"]
ACCOUNTS = ["mara.quill", "tobin_vesk", "root", "svc-backup", "ilsa.dorne", "okko"]
PATHS = ["/var/lib/zeld/state.db", "/etc/quill/app.conf", "/srv/data/batch-7/input.csv", "/tmp/x1"]
TEMPLATES = [
    "{ts} {host} {svc}[{pid}]: Failed password for {acct} from {ip} port {port} ssh2",
    "{ts} {host} {svc}[{pid}]: Accepted publickey for {acct} from {ip} port {port}",
    "{ts} {host} {svc}[{pid}]: error opening {path}: permission denied (code E{code})",
    "{ts} {host} {svc}[{pid}]: request id={rid} user={acct} status={status} took {ms}ms",
    "{ts} {host} kernel: eth0: link up, 1000 Mbps, full duplex, lpa 0x{hexv}",
    "{ts} {host} {svc}[{pid}]: connection from {ip} closed by peer after {ms} ms",
    "{ts} {host} {svc}[{pid}]: scheduler queued job {rid} for {acct} on {host2}",
]


def make_line(rng: random.Random) -> str:
    return rng.choice(TEMPLATES).format(
        ts=f"2031-0{rng.randint(1, 9)}-{rng.randint(10, 28)}T{rng.randint(10, 23)}:"
           f"{rng.randint(10, 59)}:{rng.randint(10, 59)}Z",
        host=rng.choice(HOSTS), host2=rng.choice(HOSTS), svc=rng.choice(SERVICES),
        pid=rng.randint(100, 65000), acct=rng.choice(ACCOUNTS), path=rng.choice(PATHS),
        ip=f"10.{rng.randint(0, 255)}.{rng.randint(0, 255)}.{rng.randint(1, 254)}",
        port=rng.randint(1024, 65535), code=rng.randint(100, 999), status=rng.choice([200, 403, 500]),
        rid=f"{rng.getrandbits(48):012x}", ms=rng.randint(1, 5000), hexv=f"{rng.getrandbits(16):04x}",
    )


_SPLIT = re.compile(r"[\w.@/:-]+?(?=[\s\[\]=,()]|:\s|:$|$)|[\[\]=,()]|:")


def _fallback_tokenize(line: str) -> tuple[list[str], list[str]]:
    texts = _SPLIT.findall(line)
    kinds = ["number" if t.isdigit() else "punct" if not any(c.isalnum() for c in t) else "word"
             for t in texts]
    return texts, kinds


def tokenizer():
    try:
        from streamtag.tokenize import tokenize
    except ImportError:
        return _fallback_tokenize, "regex split (streamtag.tokenize not importable)"

    def split(line: str) -> tuple[list[str], list[str]]:
        tokens = tokenize(line)
        return tokens.texts, tokens.kinds

    return split, "streamtag.tokenize"


def timed(action) -> tuple[float, object]:
    """CPU seconds of this process (steadier than wall time on a shared machine) and the result."""
    began = time.process_time()
    result = action()
    return time.process_time() - began, result


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--lines", type=int, default=40_000)
    parser.add_argument("--batch", type=int, default=256)
    parser.add_argument("--repeat", type=int, default=3)
    parser.add_argument("--pool", type=int, default=300, help="distinct lines of the repeated workload")
    args = parser.parse_args()

    split, how = tokenizer()
    rng = random.Random(7)
    spec = FeatureSpec.default()
    train = [split(make_line(rng)) for _ in range(20_000)]
    extractor = FeatureExtractor(spec)
    fit_seconds, vocabulary = timed(lambda: extractor.fit(train, min_count=2))
    train_tokens = sum(len(t) for t, _ in train)
    print(f"tokens from       {how}")
    print(f"fit               {train_tokens:,} tokens in {fit_seconds:.2f}s = "
          f"{train_tokens / fit_seconds:,.0f} tokens/s; vocabulary {len(vocabulary):,} (min_count 2)")

    pool = [split(make_line(rng)) for _ in range(args.pool)]
    workloads = {
        "repeated": [pool[i % len(pool)] for i in range(args.lines)],
        "fresh": [split(make_line(rng)) for _ in range(args.lines)],
    }
    for name, lines in workloads.items():
        batches = [lines[i:i + args.batch] for i in range(0, len(lines), args.batch)]
        n_tokens = sum(len(t) for t, _ in lines)
        fresh_extractor = FeatureExtractor(spec, vocabulary)
        cold, _ = timed(lambda: [fresh_extractor.transform(b) for b in batches])
        warm = min(timed(lambda: [fresh_extractor.transform(b) for b in batches])[0]
                   for _ in range(args.repeat))
        nnz = sum(fresh_extractor.transform(b)[0].nnz for b in batches[:10])
        rows = sum(len(t) for b in batches[:10] for t, _ in b)
        print(f"{name:<9} {len(lines):,} lines, {n_tokens:,} tokens ({n_tokens / len(lines):.1f}/line), "
              f"batch {args.batch}: cold cache {n_tokens / cold:,.0f} tokens/s, "
              f"warm {n_tokens / warm:,.0f} tokens/s, {nnz / rows:.1f} features/token")
    pipeline(spec, vocabulary, [make_line(rng) for _ in range(args.lines)], args.batch)
    tagger_path(spec, vocabulary, [make_line(rng) for _ in range(args.lines)],
                [make_line(rng) for _ in range(args.lines)], args.repeat)


def pipeline(spec: FeatureSpec, vocabulary: list[str], raw_lines: list[str], batch: int) -> None:
    """tokenize -> features -> emissions -> Viterbi on fresh lines, in CPU seconds."""
    try:
        import numpy as np

        from streamtag import crf
        from streamtag.tokenize import tokenize
    except ImportError as missing:
        print(f"pipeline  skipped ({missing})")
        return
    n_labels = 19
    rng = np.random.default_rng(3)
    emission = rng.normal(size=(len(vocabulary), n_labels))
    trans, start, end = (rng.normal(size=(n_labels, n_labels)), rng.normal(size=n_labels),
                         rng.normal(size=n_labels))
    extractor = FeatureExtractor(spec, vocabulary)
    chunks = [raw_lines[i:i + batch] for i in range(0, len(raw_lines), batch)]
    stage = {"tokenize": 0.0, "features": 0.0, "decode": 0.0}
    n_tokens = 0
    for chunk in chunks:
        seconds, tokens = timed(lambda: [tokenize(line) for line in chunk])
        stage["tokenize"] += seconds
        pairs = [(t.texts, t.kinds) for t in tokens]
        n_tokens += sum(len(t.texts) for t in tokens)
        seconds, (matrix, lengths) = timed(lambda: extractor.transform(pairs))
        stage["features"] += seconds
        seconds, _ = timed(lambda: crf.viterbi(np.asarray(matrix @ emission), lengths, trans, start, end))
        stage["decode"] += seconds
    total = sum(stage.values())
    parts = ", ".join(f"{name} {n_tokens / s:,.0f}/s" for name, s in stage.items())
    print(f"pipeline  {len(raw_lines):,} fresh lines, {n_tokens:,} tokens: {n_tokens / total:,.0f} tokens/s "
          f"overall ({parts})")


def tagger_path(spec: FeatureSpec, vocabulary: list[str], warmup: list[str], raw_lines: list[str],
                repeat: int, batch: int = 1000) -> None:
    """As `tagger.Tagger` scores a batch: lazy tokens -> type rows by key -> emissions, per stage."""
    try:
        import numpy as np

        from streamtag.features import EmissionScorer
        from streamtag.tokenize import BatchTokenizer
    except ImportError as missing:
        print(f"tagger path skipped ({missing})")
        return
    weights = np.random.default_rng(5).normal(size=(len(vocabulary), 19))
    extractor = FeatureExtractor(spec, vocabulary)
    best = {"tokenize": float("inf"), "type rows": float("inf"), "emissions": float("inf")}
    for _ in range(repeat):
        tokenizer, scorer = BatchTokenizer(), EmissionScorer(extractor, weights)
        spent = dict.fromkeys(best, 0.0)
        for number, lines in enumerate((warmup, raw_lines)):
            for i in range(0, len(lines), batch):
                seconds, tokens = timed(lambda: tokenizer.tokenize_lines(lines[i:i + batch], lazy=True))
                spent["tokenize"] += seconds
                seconds, rows = timed(lambda: scorer.type_rows(tokens.texts, tokens.kinds, tokens.keys,
                                                               tokens.generation))
                spent["type rows"] += seconds
                seconds, emissions = timed(lambda: scorer.emissions(rows, tokens.counts))
                spent["emissions"] += seconds
                if i == 0 and number == 1:
                    pairs = [(t.texts, t.kinds) for t in tokens.per_line()]
                    expected = extractor.transform(pairs)[0] @ weights
                    if not np.allclose(emissions, expected, rtol=0, atol=1e-9):
                        raise SystemExit("emissions differ from transform(...) @ W")
            if number == 0:
                spent = dict.fromkeys(best, 0.0)      # the warm-up lines fill the caches, uncounted
        best = {name: min(best[name], spent[name]) for name in best}
    parts = ", ".join(f"{name} {s / len(raw_lines) * 1e6:.2f}" for name, s in best.items())
    print(f"tagger path {len(raw_lines):,} fresh lines after {len(warmup):,}, batches of {batch}, best of "
          f"{repeat}: us/line {parts}")


if __name__ == "__main__":
    main()
