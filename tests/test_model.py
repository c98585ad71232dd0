"""Model file: round trip, content id, and one-line errors for damaged files."""

import io
import os
import stat
import zipfile

import numpy as np
import pytest

from streamtag.errors import ModelError
from streamtag.model import Model, load_model, model_from_bytes, model_to_bytes, save_model


def small_model(seed: int = 0) -> Model:
    rng = np.random.default_rng(seed)
    labels = ["O", "B-host", "I-host"]
    vocabulary = ["bias", "lower=web", "lower=db", "shape=dd"]
    emission = rng.normal(size=(4, 3))
    emission[3] = 0.0  # an all-zero row is dropped on save
    return Model(
        labels=labels,
        feature_spec={"version": 1},
        vocabulary=vocabulary,
        emission=emission,
        transitions=rng.normal(size=(3, 3)),
        start=rng.normal(size=3),
        end=rng.normal(size=3),
        metadata={"options": {"l2": 1.0}},
        run_info={"trained_at": "2026-12-01T00:00:00Z"},
    )


def test_round_trip_keeps_weights_and_drops_zero_rows(tmp_path):
    model = small_model()
    path = tmp_path / "m.stm"
    model_id = save_model(model, path)
    loaded = load_model(path)
    assert loaded.model_id == model_id
    assert loaded.labels == model.labels
    assert loaded.vocabulary == model.vocabulary[:3]
    # float32 storage: weights agree to single precision (IEEE 754 binary32, ~7 digits).
    np.testing.assert_allclose(loaded.emission, model.emission[:3], rtol=1e-6)
    np.testing.assert_allclose(loaded.transitions, model.transitions, rtol=1e-6)
    assert loaded.run_info == model.run_info


def test_id_ignores_run_info_but_not_weights():
    a, b = small_model(), small_model()
    b.run_info = {"trained_at": "another day"}
    assert model_to_bytes(a)[1] == model_to_bytes(b)[1]
    c = small_model()
    c.transitions = c.transitions + 1.0
    assert model_to_bytes(a)[1] != model_to_bytes(c)[1]


def test_saved_file_is_written_atomically_with_mode(tmp_path):
    path = tmp_path / "sub" / "m.stm"
    save_model(small_model(), path, mode=0o600)
    assert stat.S_IMODE(os.stat(path).st_mode) == 0o600
    assert [p.name for p in path.parent.iterdir()] == ["m.stm"]  # no temp file left behind


def test_truncated_file_is_one_line_error(tmp_path):
    data, _ = model_to_bytes(small_model())
    for cut in (0, 10, len(data) // 2, len(data) - 5):
        with pytest.raises(ModelError) as err:
            model_from_bytes(data[:cut], "m.stm")
        assert "\n" not in str(err.value) and "m.stm" in str(err.value)


def test_flipped_byte_is_refused_or_harmless():
    original = small_model().pruned()
    data, model_id = model_to_bytes(original)
    refused = 0
    for position in range(0, len(data), max(1, len(data) // 80)):
        damaged = bytearray(data)
        damaged[position] ^= 0xFF
        try:
            loaded = model_from_bytes(bytes(damaged))
        except ModelError as exc:
            assert "\n" not in str(exc)
            refused += 1
            continue
        # A flip in zip bookkeeping (e.g. a timestamp) may load; it must then be the same model:
        # zip CRC-32 (PKWARE APPNOTE 4.4.7) and our content hash guard every byte that matters.
        assert loaded.model_id == model_id
        np.testing.assert_array_equal(loaded.emission, original.emission.astype(np.float32))
    assert refused > 0


def test_wrong_version_and_foreign_files(tmp_path):
    with pytest.raises(ModelError, match="not a streamtag model"):
        model_from_bytes(b"hello world")
    buffer = io.BytesIO()
    np.savez(buffer, header=np.frombuffer(b'{"format": "streamtag-model", "version": 99}', dtype=np.uint8),
             content_id=np.zeros(1, np.uint8), emission=np.zeros((0, 0)), transitions=np.zeros((0, 0)),
             start=np.zeros(0), end=np.zeros(0))
    with pytest.raises(ModelError, match="version 99"):
        model_from_bytes(buffer.getvalue())
    with pytest.raises(ModelError, match="not found"):
        load_model(tmp_path / "missing.stm")


def test_object_arrays_are_refused_never_unpickled():
    # np.load(allow_pickle=False) refuses object arrays (NumPy documentation of numpy.load).
    buffer = io.BytesIO()
    with zipfile.ZipFile(buffer, "w") as archive:
        inner = io.BytesIO()
        np.save(inner, np.array([{"x": 1}], dtype=object), allow_pickle=True)
        for name in ("header", "content_id", "emission", "transitions", "start", "end"):
            archive.writestr(f"{name}.npy", inner.getvalue())
    with pytest.raises(ModelError):
        model_from_bytes(buffer.getvalue())


def test_unusable_feature_spec_is_a_model_error():
    model = small_model()
    model.feature_spec = {"token": {"groups": ["no-such-group"]}}
    data, _ = model_to_bytes(model)
    with pytest.raises(ModelError, match="feature spec"):
        model_from_bytes(data, "m.stm")
