"""Model files that are not regular files or not archives get geosr's own one-line errors."""

from __future__ import annotations

import os
import threading

import numpy as np
import pytest

from geosr.errors import ModelError
from geosr.modelfile import default_model_path, load_guided_model, load_models


def _load_in_thread(loader, path, timeout=10):
    """Run loader(path) in a thread: the error it raised, or a failure if it blocks."""
    out = {}

    def run():
        try:
            loader(path)
        except Exception as exc:  # noqa: BLE001 - handed to the test
            out["error"] = exc

    thread = threading.Thread(target=run, daemon=True)
    thread.start()
    thread.join(timeout)
    if thread.is_alive():
        with open(path, "wb"):  # a writer releases a reader blocked on the pipe
            pass
        thread.join(timeout)
        pytest.fail(f"{loader.__name__} blocked on {path}")
    return out.get("error")


@pytest.mark.skipif(not hasattr(os, "mkfifo"), reason="no named pipes here")
@pytest.mark.parametrize("loader", [load_models, load_guided_model])
def test_named_pipe_refused_without_opening_it(tmp_path, loader):
    fifo = tmp_path / "model.npz"
    os.mkfifo(fifo)
    error = _load_in_thread(loader, fifo)
    assert isinstance(error, ModelError)
    assert "must be a regular file, got a named pipe" in str(error)


def test_device_refused(tmp_path):
    with pytest.raises(ModelError, match="must be a regular file, got a device"):
        load_models(os.devnull)


@pytest.mark.parametrize("content, reason", [
    (b"header,value\n1,2\n", "not an .npz (zip) archive"),
    (b"", "an empty file"),
    (b"\x93NUMPY\x01\x00v\x00{'descr': '|O', 'fortran_order': False, 'shape': (1,), }", "not an .npz"),
])
def test_not_an_archive_gets_geosrs_words(tmp_path, content, reason):
    path = tmp_path / "renamed.npz"
    path.write_bytes(content)
    with pytest.raises(ModelError) as info:
        load_models(path)
    assert reason in str(info.value)
    assert "pickle" not in str(info.value).lower()


def test_object_arrays_never_loaded_and_never_advised(tmp_path):
    path = tmp_path / "objects.npz"
    np.savez(path, header=np.array([{"format": "geosr-model"}], dtype=object))
    with pytest.raises(ModelError) as info:
        load_models(path)
    assert "holds Python objects, which geosr never loads" in str(info.value)
    assert "pickle" not in str(info.value).lower()


@pytest.mark.parametrize("method", ["anchored", "sparse"])
def test_truncated_archive(tmp_path, method):
    path = tmp_path / "cut.npz"
    with default_model_path(2, method).open("rb") as fh:
        path.write_bytes(fh.read()[:2000])
    with pytest.raises(ModelError, match=r"damaged or truncated \.npz archive"):
        load_models(path)


def test_no_geosr_message_advises_unpickling():
    # numpy's own message for object arrays says "allow_pickle=True"; no
    # string in geosr's sources may carry that advice to the user.
    root = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))
    for folder, _, files in os.walk(os.path.join(root, "geosr")):
        for name in files:
            if name.endswith(".py"):
                with open(os.path.join(folder, name), encoding="utf-8") as fh:
                    text = fh.read()
                assert "allow_pickle=True" not in text, name
                assert "allow_pickle=" not in text.replace("allow_pickle=False", ""), name


# --- a model file is never replaced without overwrite, even by a run that started later
def test_save_without_overwrite_refuses_an_existing_file_and_keeps_it(tmp_path, tiny_model):
    from geosr.errors import DestinationError
    from geosr.modelfile import save_models

    path = tmp_path / "m.npz"
    path.write_bytes(b"another run's model")
    with pytest.raises(DestinationError, match="must not exist already"):
        save_models(path, [tiny_model], overwrite=False)
    assert path.read_bytes() == b"another run's model"
    assert sorted(p.name for p in tmp_path.iterdir()) == ["m.npz"]  # no temporary left
    save_models(path, [tiny_model], overwrite=True)
    assert path.read_bytes()[:2] == b"PK"  # an .npz (zip) archive replaced it


def test_half_precision_halves_the_stored_array_and_keeps_the_checksum_rules(tmp_path, tiny_model):
    from geosr.modelfile import half_precision, save_models

    half = half_precision(tiny_model, ("projections",))
    # Rounded to the nearest float16 (IEEE 754 binary16, as numpy converts), kept in float32.
    np.testing.assert_array_equal(half.projections_, tiny_model.projections_.astype(np.float16).astype(np.float32))
    assert half.projections_.dtype == np.float32 and half.sha256_ != tiny_model.sha256_
    np.testing.assert_array_equal(half.dictionary_low_, tiny_model.dictionary_low_)
    assert tiny_model.projections_.dtype == np.float32  # the model given is not changed
    save_models(tmp_path / "full.npz", [tiny_model])
    save_models(tmp_path / "half.npz", [half])
    with np.load(tmp_path / "half.npz") as npz:
        assert npz["m0_projections"].dtype == np.float16
        assert npz["m0_dictionary_low"].dtype == np.float32  # not exactly float16: kept
    with np.load(tmp_path / "full.npz") as npz:
        assert npz["m0_projections"].dtype == np.float32
    (loaded,) = load_models(tmp_path / "half.npz")
    assert loaded.sha256_ == half.sha256_ and loaded.projections_.dtype == np.float32
    np.testing.assert_array_equal(loaded.projections_, half.projections_)
    assert os.path.getsize(tmp_path / "half.npz") < os.path.getsize(tmp_path / "full.npz")


def test_half_precision_refuses_unknown_arrays_and_values_beyond_float16(tiny_model):
    import copy

    from geosr.errors import ParameterError
    from geosr.modelfile import half_precision

    with pytest.raises(ParameterError, match="must name model arrays"):
        half_precision(tiny_model, ("weights",))
    big = copy.deepcopy(tiny_model)
    big.projections_ = big.projections_ * 0 + 1e6  # beyond float16's largest finite value, 65504
    with pytest.raises(ParameterError, match="must fit in float16"):
        half_precision(big, ("projections",))
