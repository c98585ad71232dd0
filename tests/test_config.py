"""Watch configuration: defaults, the documented sample file, validation errors, overrides.

External references:
- TOML v1.0.0 specification (toml.io/en/v1.0.0): tables ("[section]"), the value types (string,
  integer, float, boolean, array), and that integers and booleans are distinct types.
- Python's ``tomllib`` (standard library) as the reference parser for what a file contains.
- POSIX file mode bits (chmod(2)): octal 0600 = owner read+write.
"""

from __future__ import annotations

import os
import re
import subprocess
import sys
import tomllib
from pathlib import Path

import pytest

from streamtag.config import WatchConfig, known_keys, load_watch_config
from streamtag.errors import ConfigError

REPO = Path(__file__).resolve().parent.parent
SAMPLE = REPO / "config" / "streamtag.toml"
SHIPPED = REPO / "streamtag" / "defaults" / "streamtag.toml"


def write_config(tmp_path: Path, text: str) -> Path:
    path = tmp_path / "watch.toml"
    path.write_text(text, encoding="utf-8")
    return path


def config_error(tmp_path: Path, text: str) -> str:
    path = write_config(tmp_path, text)
    with pytest.raises(ConfigError) as caught:
        load_watch_config(path, {})
    message = str(caught.value)
    # common practice (and the project rule): an expected error is ONE line
    assert "\n" not in message
    assert str(path) in message
    return message


# -- defaults and the sample file --------------------------------------------------------------


def test_built_in_defaults_without_a_file():
    config = load_watch_config(None, {})
    assert config == WatchConfig()
    assert config.file_mode == 0o600  # chmod(2): owner read+write only
    assert config.config_path is None


def test_sample_file_sets_every_key_to_its_default():
    """The sample documents each key with its default: loading it must give the built-in defaults."""
    config = load_watch_config(SAMPLE, {})
    expected = WatchConfig(config_path=str(SAMPLE))
    assert config == expected


def test_sample_file_names_every_known_key_and_nothing_else():
    # tomllib (reference TOML parser) tells what keys the sample really sets
    document = tomllib.loads(SAMPLE.read_text(encoding="utf-8"))
    present = {f"{section}.{name}" for section, table in document.items() for name in table}
    assert present == set(known_keys())


def test_sample_file_comments_every_key():
    """Each key line has a comment block right above it (the documentation)."""
    lines = SAMPLE.read_text(encoding="utf-8").splitlines()
    for index, line in enumerate(lines):
        if re.match(r"^[a-z_]+ = ", line):
            assert lines[index - 1].startswith("#"), f"key without a comment: {line}"


def test_shipped_defaults_are_a_copy_of_the_sample():
    assert SHIPPED.read_bytes() == SAMPLE.read_bytes()


# -- values --------------------------------------------------------------------------------------


def test_values_from_a_file(tmp_path):
    path = write_config(tmp_path, """
[inputs]
paths = ["/srv/logs/*.log", "~/more"]
start_at = "end"
format = "json"
text_field = "event.message"
idle_flush_seconds = 0
poll_interval_seconds = 2

[model]
path = "/srv/models/m.stm"
max_tokens = 64
window_overlap = 8

[output]
path = "/srv/out/tagged.jsonl"
review_path = "/srv/out/review.jsonl"
review_threshold = 0.75
file_mode = "0640"

[batch]
max_lines = 100
max_wait_ms = 0

[state]
directory = "/srv/state"
stats_interval_seconds = 10
""")
    config = load_watch_config(path, {})
    assert config.inputs == ["/srv/logs/*.log", os.path.expanduser("~/more")]
    assert config.start_at == "end"
    assert config.input_format == "json"
    assert config.text_field == "event.message"
    assert config.idle_flush_seconds is None  # 0 = off
    # TOML v1.0.0: 2 is an integer; a float key accepts it as the same number
    assert config.poll_interval_seconds == 2.0 and isinstance(config.poll_interval_seconds, float)
    assert config.model_path == "/srv/models/m.stm"
    assert (config.max_tokens, config.window_overlap) == (64, 8)
    assert config.review_threshold == 0.75
    assert config.file_mode == 0o640  # chmod(2): rw-r-----
    assert (config.batch_max_lines, config.batch_max_wait_ms) == (100, 0)
    assert config.state_dir == "/srv/state"
    assert config.stats_interval_seconds == 10.0
    assert config.config_path == str(path)


@pytest.mark.parametrize("text, mode", [('"0600"', 0o600), ('"600"', 0o600), ('"0o640"', 0o640), ('"0700"', 0o700)])
def test_file_mode_octal_strings(tmp_path, text, mode):
    # chmod(2) octal notation
    path = write_config(tmp_path, f"[output]\nfile_mode = {text}\n")
    assert load_watch_config(path, {}).file_mode == mode


def test_empty_model_path_means_bundled_model(tmp_path):
    path = write_config(tmp_path, '[model]\npath = ""\n')
    assert load_watch_config(path, {}).model_path is None


# -- errors: one line naming key and file ----------------------------------------------------------


def test_unknown_key(tmp_path):
    message = config_error(tmp_path, "[output]\ncolour = \"blue\"\n")
    assert "output.colour" in message and "unknown" in message


def test_unknown_section(tmp_path):
    message = config_error(tmp_path, "[outputs]\npath = \"x\"\n")
    assert "[outputs]" in message and "unknown" in message


def test_unknown_top_level_key(tmp_path):
    message = config_error(tmp_path, "verbose = true\n")
    assert "'verbose'" in message


def test_section_given_as_a_value(tmp_path):
    message = config_error(tmp_path, "inputs = [\"/x\"]\n")
    assert "inputs" in message and "section" in message


@pytest.mark.parametrize("text, key", [
    ("[batch]\nmax_lines = \"many\"\n", "batch.max_lines"),
    # TOML v1.0.0: booleans are their own type, not integers
    ("[batch]\nmax_lines = true\n", "batch.max_lines"),
    ("[model]\nmax_tokens = 12.5\n", "model.max_tokens"),
    ("[output]\nreview_threshold = \"high\"\n", "output.review_threshold"),
    ("[inputs]\npaths = \"/var/log/x.log\"\n", "inputs.paths"),
    ("[inputs]\npaths = [\"/ok\", 3]\n", "inputs.paths"),
    ("[output]\nfile_mode = 600\n", "output.file_mode"),
    ("[output]\npath = 7\n", "output.path"),
    ("[inputs]\nstart_at = \"middle\"\n", "inputs.start_at"),
    ("[inputs]\nformat = \"xml\"\n", "inputs.format"),
    ("[inputs]\ntext_field = \"a..b\"\n", "inputs.text_field"),
])
def test_wrong_type_or_choice(tmp_path, text, key):
    message = config_error(tmp_path, text)
    assert key in message


@pytest.mark.parametrize("text, key", [
    ("[output]\nreview_threshold = 1.5\n", "output.review_threshold"),
    ("[output]\nreview_threshold = -0.1\n", "output.review_threshold"),
    ("[output]\nreview_threshold = nan\n", "output.review_threshold"),  # TOML v1.0.0 allows nan
    ("[model]\nmax_tokens = 1\n", "model.max_tokens"),
    ("[batch]\nmax_lines = 0\n", "batch.max_lines"),
    ("[batch]\nmax_wait_ms = -1\n", "batch.max_wait_ms"),
    ("[inputs]\nmax_line_bytes = 10\n", "inputs.max_line_bytes"),
    ("[inputs]\npoll_interval_seconds = 0\n", "inputs.poll_interval_seconds"),
    ("[state]\nstats_interval_seconds = 0\n", "state.stats_interval_seconds"),
    ("[output]\nfile_mode = \"0999\"\n", "output.file_mode"),
    ("[output]\nfile_mode = \"0400\"\n", "output.file_mode"),  # owner could not append
    ("[model]\nmax_tokens = 10\nwindow_overlap = 6\n", "model.window_overlap"),
])
def test_out_of_range(tmp_path, text, key):
    message = config_error(tmp_path, text)
    assert key in message


def test_output_and_review_must_differ(tmp_path):
    message = config_error(tmp_path, "[output]\npath = \"/x/a.jsonl\"\nreview_path = \"/x/a.jsonl\"\n")
    assert "output.review_path" in message


def test_missing_file(tmp_path):
    missing = tmp_path / "nope.toml"
    with pytest.raises(ConfigError) as caught:
        load_watch_config(missing, {})
    assert str(caught.value) == f"{missing}: config file not found"


def test_directory_instead_of_file(tmp_path):
    with pytest.raises(ConfigError) as caught:
        load_watch_config(tmp_path, {})
    assert str(tmp_path) in str(caught.value) and "\n" not in str(caught.value)


def test_invalid_toml_names_file_and_line(tmp_path):
    # TOML v1.0.0: a key needs a value; tomllib reports the line
    message = config_error(tmp_path, "[output]\npath = \n")
    assert "line 2" in message


def test_invalid_utf8_file(tmp_path):
    path = tmp_path / "bad.toml"
    path.write_bytes(b"[output]\npath = \"\xff\xfe\"\n")  # TOML v1.0.0: files are UTF-8
    with pytest.raises(ConfigError) as caught:
        load_watch_config(path, {})
    assert str(path) in str(caught.value) and "\n" not in str(caught.value)


def test_unreadable_file(tmp_path):
    path = write_config(tmp_path, "[output]\npath = \"x\"\n")
    path.chmod(0)
    # A subprocess without CAP_DAC_OVERRIDE (capabilities(7)): even root then gets EACCES.
    from daemon_support import _die_with_parent_without_file_override

    result = subprocess.run([sys.executable, "-m", "streamtag.daemon", "--config", str(path)], capture_output=True,
                            text=True, timeout=60, cwd=REPO, preexec_fn=_die_with_parent_without_file_override)
    assert result.returncode == 2
    assert result.stderr.strip() == f"streamtag: {path}: cannot read config file (permission denied)"


# -- overrides (the command line) ------------------------------------------------------------------


def test_overrides_win_over_the_file(tmp_path):
    path = write_config(tmp_path, "[output]\npath = \"/from/file.jsonl\"\nreview_threshold = 0.2\n")
    config = load_watch_config(path, {"output": "/from/cli.jsonl", "threshold": 0.9,
                                      "inputs": ["/cli/*.log"], "state": "/cli/state", "model": "/cli/m.stm"})
    assert config.output_path == "/from/cli.jsonl"
    assert config.review_threshold == 0.9
    assert config.inputs == ["/cli/*.log"]
    assert config.state_dir == "/cli/state"
    assert config.model_path == "/cli/m.stm"


def test_override_by_dotted_key_and_field_name():
    config = load_watch_config(None, {"batch.max_lines": 7, "review_path": "/r.jsonl", "output.path": None})
    assert config.batch_max_lines == 7
    assert config.review_path == "/r.jsonl"
    assert config.output_path == WatchConfig().output_path  # None = not given


def test_override_is_validated():
    with pytest.raises(ConfigError) as caught:
        load_watch_config(None, {"threshold": 3.0})
    assert str(caught.value) == "command line: output.review_threshold: 3 is out of range [0..1]"


def test_unknown_override():
    with pytest.raises(ConfigError) as caught:
        load_watch_config(None, {"colour": "blue"})
    assert "colour" in str(caught.value)


# -- through the command line -----------------------------------------------------------------------


def run_module(*args: str) -> subprocess.CompletedProcess:
    return subprocess.run([sys.executable, *args], capture_output=True, text=True, timeout=60, cwd=REPO)


def test_daemon_entry_point_bad_config_exits_2_with_one_line(tmp_path):
    path = write_config(tmp_path, "[batch]\nmax_lines = \"many\"\n")
    result = run_module("-m", "streamtag.daemon", "--config", str(path))
    assert result.returncode == 2  # the project's exit code for configuration errors (errors.ConfigError)
    lines = result.stderr.strip().splitlines()
    assert len(lines) == 1 and "batch.max_lines" in lines[0] and str(path) in lines[0]


def test_cli_watch_missing_config_exits_2_with_one_line(tmp_path):
    missing = tmp_path / "absent.toml"
    result = run_module("-m", "streamtag", "watch", "--config", str(missing))
    assert result.returncode == 2
    lines = result.stderr.strip().splitlines()
    assert len(lines) == 1 and str(missing) in lines[0]
