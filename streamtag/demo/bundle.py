"""The recipe of the bundled model: demo data from a fixed seed, trained with fixed options.

`python -m streamtag.demo.bundle` rebuilds streamtag/data/demo-model.stm. Running the same
recipe through `streamtag train` gives a model with the same id (tests/test_bundled_model.py),
so anyone can check that the shipped weights come from the shipped code and data generator.
"""

from __future__ import annotations

import argparse
import tempfile
from pathlib import Path

from streamtag.cli import main as cli_main
from streamtag.model import default_model_path, load_model

DATA_SEED = 7
TRAIN_ARGS = ["--l1", "0.05", "--l2", "0.1", "--max-iter", "50", "--seed", "0"]


def write_data(folder: Path) -> dict:
    from streamtag.demo.generate import write_demo_data

    return write_demo_data(folder, seed=DATA_SEED)


def train_command(paths: dict, out: Path) -> list[str]:
    """The `streamtag train` arguments of the recipe."""
    return ["train", "--data", str(paths["train"]), "--dev", str(paths["dev"]), *TRAIN_ARGS, "--quiet",
            "--out", str(out)]


def build(out: Path, data_dir: Path | None = None) -> str:
    """Generate the demo data and train the bundled model into ``out``; returns the model id."""
    with tempfile.TemporaryDirectory() as scratch:
        paths = write_data(Path(data_dir or scratch))
        status = cli_main(train_command(paths, out))
        if status != 0:
            raise SystemExit(status)
    return load_model(out).model_id


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(prog="python -m streamtag.demo.bundle", description=__doc__.splitlines()[0])
    parser.add_argument("--out", type=Path, default=default_model_path())
    parser.add_argument("--data-dir", type=Path, help="keep the generated data here")
    args = parser.parse_args(argv)
    model_id = build(args.out, args.data_dir)
    print(f"{args.out}: {model_id}")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
