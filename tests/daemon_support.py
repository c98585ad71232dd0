"""Helpers shared by the daemon tests and the daemon benchmark.

- ``build_tiny_model``: a small but complete model (real feature spec and vocabulary, random weights)
  written with ``save_model``, so the daemon tests do not depend on training.
- ``write_config``: a watch config file for a test directory.
- ``DaemonProcess``: the daemon as a real subprocess (``python -m streamtag.daemon``).
- ``read_records``: parse a JSON Lines output file.
"""

from __future__ import annotations

import os
import signal
import subprocess
import sys
import time
from pathlib import Path

import numpy as np
import orjson

from streamtag.features import FeatureExtractor, FeatureSpec
from streamtag.model import Model, save_model
from streamtag.spans import label_list
from streamtag.tokenize import tokenize

REPO = Path(__file__).resolve().parent.parent
FEATURES_TOML = REPO / "config" / "features.toml"

# Invented log lines (fictional hosts, accounts and addresses from documentation ranges).
SAMPLE_LINES = [
    "gatewarden[311]: login failed for user kestrel from 192.0.2.14 port 2201",
    "relay-07 mailferry[88]: connect from mailer.example.invalid[198.51.100.3]",
    "netwatch: port nic0 link up on host brindle-04",
    "app[2041]: user marigold.fenn opened /srv/data/reports/q3.csv",
    "tasker[77]: job backup-nightly finished with code E4012 on vault-02",
]


def build_tiny_model(path: str | os.PathLike, seed: int = 0) -> str:
    """Save a small random-weight model at ``path``; returns its model id.

    Different seeds give different weights, hence different model ids (for swap tests).
    """
    spec = FeatureSpec.from_toml(FEATURES_TOML)
    extractor = FeatureExtractor(spec)
    sentences = [(tokens.texts, tokens.kinds) for tokens in map(tokenize, SAMPLE_LINES)]
    vocabulary = extractor.fit(sentences)
    labels = label_list(["account", "host", "netaddr"])
    rng = np.random.default_rng(seed)
    n_features, n_labels = len(vocabulary), len(labels)
    model = Model(
        labels=labels,
        feature_spec=spec.to_dict(),
        vocabulary=vocabulary,
        emission=rng.normal(0.0, 1.0, size=(n_features, n_labels)),
        transitions=rng.normal(0.0, 0.5, size=(n_labels, n_labels)),
        start=rng.normal(0.0, 0.5, size=n_labels),
        end=rng.normal(0.0, 0.5, size=n_labels),
        metadata={"purpose": "daemon tests", "seed": seed},
    )
    return save_model(model, path)


def write_config(directory: Path, input_paths: list[str], model: Path, **sections) -> Path:
    """A config under ``directory`` with outputs and state inside it; ``sections`` add/override keys,
    e.g. ``batch={"max_lines": 50}``."""
    values = {
        "inputs": {"paths": input_paths, "poll_interval_seconds": 0.2, "idle_flush_seconds": 0.5},
        "model": {"path": str(model)},
        "output": {"path": str(directory / "out" / "tagged.jsonl"),
                   "review_path": str(directory / "out" / "review.jsonl"),
                   "review_threshold": 0.5},
        "batch": {"max_lines": 200, "max_wait_ms": 20},
        "state": {"directory": str(directory / "state"), "stats_interval_seconds": 60},
    }
    for section, keys in sections.items():
        values.setdefault(section, {}).update(keys)
    text = []
    for section, keys in values.items():
        text.append(f"[{section}]")
        for key, value in keys.items():
            text.append(f"{key} = {_toml_value(value)}")
        text.append("")
    path = directory / "watch.toml"
    path.write_text("\n".join(text), encoding="utf-8")
    return path


def _toml_value(value) -> str:
    if isinstance(value, bool):
        return "true" if value else "false"
    if isinstance(value, (int, float)):
        return repr(value)
    if isinstance(value, str):
        return orjson.dumps(value).decode()  # a JSON string is a valid TOML basic string here
    if isinstance(value, list):
        return "[" + ", ".join(_toml_value(v) for v in value) + "]"
    raise TypeError(type(value))


def read_records(path: Path) -> list[dict]:
    if not path.exists():
        return []
    return [orjson.loads(line) for line in path.read_bytes().splitlines()]


def _die_with_parent() -> None:
    """In the child: SIGKILL when the test process dies (Linux prctl PR_SET_PDEATHSIG), so a failed
    or interrupted test never leaves a daemon running."""
    try:
        import ctypes

        ctypes.CDLL(None, use_errno=True).prctl(1, signal.SIGKILL)  # 1 = PR_SET_PDEATHSIG
    except Exception:
        pass


def _die_with_parent_without_file_override() -> None:
    """As ``_die_with_parent``, and drop CAP_DAC_OVERRIDE and CAP_DAC_READ_SEARCH from the bounding
    set before exec (prctl PR_CAPBSET_DROP, capabilities(7)): even root then obeys file modes, so
    a test can check how the daemon meets "permission denied"."""
    _die_with_parent()
    import ctypes

    libc = ctypes.CDLL(None, use_errno=True)
    for capability in (1, 2):  # CAP_DAC_OVERRIDE, CAP_DAC_READ_SEARCH
        libc.prctl(24, capability)  # 24 = PR_CAPBSET_DROP


class DaemonProcess:
    """``python -m streamtag.daemon --config FILE`` as a subprocess, stderr captured to a file.

    Every started process is remembered in ``DaemonProcess.started`` so a test fixture can kill
    what a failing test left running (``kill_leftovers``).
    """

    started: list["DaemonProcess"] = []

    def __init__(self, config: Path, log_path: Path, obey_file_modes: bool = False) -> None:
        self.config = config
        self.log_path = log_path
        self.obey_file_modes = obey_file_modes
        self.process: subprocess.Popen | None = None

    def start(self) -> "DaemonProcess":
        log = open(self.log_path, "ab")
        env = dict(os.environ, PYTHONPATH=str(REPO) + os.pathsep + os.environ.get("PYTHONPATH", ""))
        self.process = subprocess.Popen(
            [sys.executable, "-m", "streamtag.daemon", "--config", str(self.config)],
            stdout=log, stderr=log, stdin=subprocess.DEVNULL, cwd=REPO, env=env,
            preexec_fn=_die_with_parent_without_file_override if self.obey_file_modes else _die_with_parent,
        )
        log.close()
        DaemonProcess.started.append(self)
        return self

    @classmethod
    def kill_leftovers(cls) -> None:
        for daemon in cls.started:
            if daemon.running():
                daemon.kill()
        cls.started.clear()

    @property
    def pid(self) -> int:
        assert self.process is not None
        return self.process.pid

    def signal(self, signum: int) -> None:
        assert self.process is not None
        self.process.send_signal(signum)

    def kill(self) -> None:
        self.signal(signal.SIGKILL)
        self.wait(30)

    def stop(self, timeout: float = 60) -> int:
        """SIGTERM and wait; the exit code."""
        self.signal(signal.SIGTERM)
        return self.wait(timeout)

    def wait(self, timeout: float) -> int:
        assert self.process is not None
        return self.process.wait(timeout)

    def running(self) -> bool:
        return self.process is not None and self.process.poll() is None

    def log_text(self) -> str:
        return self.log_path.read_text(encoding="utf-8", errors="replace") if self.log_path.exists() else ""


def wait_until(condition, timeout: float = 30.0, interval: float = 0.05, what: str = "condition"):
    """Poll ``condition()`` until it is truthy; its value. AssertionError after ``timeout``."""
    deadline = time.monotonic() + timeout
    while True:
        value = condition()
        if value:
            return value
        if time.monotonic() > deadline:
            raise AssertionError(f"timed out after {timeout:g} s waiting for {what}")
        time.sleep(interval)


def count_lines(path: Path) -> int:
    try:
        with open(path, "rb") as handle:
            return sum(chunk.count(b"\n") for chunk in iter(lambda: handle.read(1 << 20), b""))
    except FileNotFoundError:
        return 0


class InProcessDaemon:
    """The daemon loop on a thread of the test process (no signal handlers), for fault injection.

    ``write`` and ``fsync`` replace ``os.write`` and ``os.fsync`` for the output and review files.
    """

    started: list["InProcessDaemon"] = []

    def __init__(self, config_path: Path, write=os.write, overrides: dict | None = None, fsync=os.fsync) -> None:
        import threading

        from streamtag.config import load_watch_config
        from streamtag.daemon import Daemon

        self.logs: list[str] = []
        self.config = load_watch_config(config_path, overrides or {})
        self.daemon = Daemon(self.config, log=self.logs.append, write=write, fsync=fsync, install_signals=False)
        self.exit_code: int | None = None
        self.thread = threading.Thread(target=self._run, name="daemon-under-test", daemon=True)

    def _run(self) -> None:
        self.exit_code = self.daemon.run()

    def start(self) -> "InProcessDaemon":
        self.thread.start()
        InProcessDaemon.started.append(self)
        return self

    @classmethod
    def stop_leftovers(cls) -> None:
        for daemon in cls.started:
            if daemon.thread.is_alive():
                daemon.daemon.request_stop()
                daemon.thread.join(30)
        cls.started.clear()

    def stop(self, timeout: float = 60) -> int | None:
        self.daemon.request_stop()
        self.thread.join(timeout)
        assert not self.thread.is_alive(), "daemon thread did not stop"
        return self.exit_code

    def log_text(self) -> str:
        return "\n".join(self.logs)
