"""The bundled model: present, loadable, and reproducible from its recipe."""

import pytest

from streamtag.demo import bundle
from streamtag.model import default_model_path, load_model


def test_bundled_model_loads_and_is_the_default():
    model = load_model(None)
    assert default_model_path().is_file()
    labels = {label[2:] for label in model.labels if label != "O"}
    assert labels == {"host", "netaddr", "account", "service", "filepath", "errcode", "person", "place", "org"}


@pytest.mark.slow
def test_training_the_recipe_reproduces_the_bundled_model_id(tmp_path):
    # Reproducible builds (common practice): same data, options and seed give the same model id.
    # The id hashes the stored weights, labels, vocabulary and feature spec (streamtag/model.py).
    rebuilt = bundle.build(tmp_path / "rebuilt.stm", tmp_path / "data")
    assert rebuilt == load_model(None).model_id
