"""CoupledDictionary as a scikit-learn estimator: parameters, clone, checks once per call."""

import subprocess
import sys

import numpy as np
import pytest
from skimage import data
from sklearn.base import clone

import geosr.core.model as model_module
from geosr.core.model import CoupledDictionary
from geosr.core.params import PARAMETER_NAMES, check_params
from geosr.errors import ParameterError

SMALL = dict(scale=2, method="anchored", n_atoms=16, n_iter=1, max_samples=2000, neighbours=64)


def _image():
    # A bundled scikit-image photo (open licence), small enough for quick fits.
    return data.camera()[:120, :120].astype(float)


def test_parameters_are_the_constructor_arguments():
    model = CoupledDictionary()
    assert tuple(model.get_params(deep=False)) == tuple(sorted(PARAMETER_NAMES))
    assert model.get_params() == model.get_params(deep=False)


def test_clone_gives_an_unfitted_copy_with_equal_params():
    model = CoupledDictionary(**SMALL, random_state=3).fit([_image()])
    copy = clone(model)
    assert type(copy) is CoupledDictionary and copy is not model
    assert copy.get_params() == model.get_params()
    assert not hasattr(copy, "feature_kernel_") and not hasattr(copy, "sha256_")
    # The clone fits to the same model (same parameters, same seed).
    assert copy.fit([_image()]).sha256_ == model.sha256_


def test_get_params_set_params_round_trip():
    model = CoupledDictionary()
    changed = {"scale": 4, "method": "anchored", "n_atoms": 64, "ridge": 0.5, "sigma": 1.5,
               "degradation": "gaussian", "high_fit": "patch", "random_state": 11}
    assert model.set_params(**changed) is model
    params = model.get_params()
    assert {k: params[k] for k in changed} == changed
    other = CoupledDictionary().set_params(**params)
    assert other.get_params() == params
    with pytest.raises(ValueError, match="Invalid parameter"):
        model.set_params(atoms=3)  # scikit-learn's own refusal of an unknown name


@pytest.mark.parametrize(
    "name, value, fragment",
    [
        ("n_atoms", 1, "The 'n_atoms' parameter must be an integer from 2 to 100000, got 1"),
        ("scale", 9, "The 'scale' parameter must be an integer from 2 to 8, got 9"),
        ("energy", 0.0, "The 'energy' parameter must be a number greater than 0.0 and at most 1.0"),
        ("ridge", "0.1", "The 'ridge' parameter must be a number greater than 0.0"),
        ("method", "magic", "The 'method' parameter must be one of"),
        ("sparsity", 2.5, "The 'sparsity' parameter must be an integer from 1 to 64, got 2.5"),
        ("high_fit", "pixels", "The 'high_fit' parameter must be 'patch' or 'image'"),
    ],
)
def test_set_params_accepts_a_bad_value_and_fit_refuses_it(name, value, fragment):
    # scikit-learn's contract: set_params stores, the check happens when the model is used.
    model = CoupledDictionary(**SMALL).set_params(**{name: value})
    assert model.get_params()[name] == value
    with pytest.raises(ParameterError) as info:
        model.fit([_image()])
    assert str(info.value).startswith(fragment)


def test_scikit_learn_validation_skips_what_geosr_checks():
    # scikit-learn's own _validate_params keeps its contract (returns None, raises
    # nothing here): geosr declares its parameters "no_validation" and checks them itself.
    model = CoupledDictionary(scale=3.0, method="SPARSE")
    assert model._validate_params() is None
    assert check_params(model.get_params()).scale == 3


def test_seeded_fits_repeat_and_seeds_matter():
    a = CoupledDictionary(**SMALL, random_state=7).fit([_image()])
    b = CoupledDictionary(**SMALL, random_state=7).fit([_image()])
    c = CoupledDictionary(**SMALL, random_state=8).fit([_image()])
    assert a.sha256_ == b.sha256_ != c.sha256_
    np.testing.assert_array_equal(a.projections_, b.projections_)


def test_random_state_objects_seed_fits():
    a = CoupledDictionary(**SMALL, random_state=np.random.RandomState(5)).fit([_image()])
    b = CoupledDictionary(**SMALL, random_state=np.random.RandomState(5)).fit([_image()])
    assert a.sha256_ == b.sha256_
    with pytest.raises(ParameterError, match="'random_state' parameter must be a non-negative"):
        CoupledDictionary(**SMALL, random_state=-1).fit([_image()])


def test_parameters_are_checked_once_per_call(monkeypatch):
    model = CoupledDictionary(**SMALL).fit([_image()])
    calls = []

    def counting(params):
        calls.append(1)
        return check_params(params)

    monkeypatch.setattr(model_module, "check_params", counting)
    lr = _image()[:40, :50]
    model.magnify(lr, consistency=True, ensemble=True)  # eight passes, back-projection steps
    assert len(calls) == 1
    calls.clear()
    model.fit([_image(), _image()[::-1]])
    assert len(calls) == 1


def test_importing_the_core_configures_nothing():
    # No BLAS thread controller, thread pool or cache is created at import.
    code = (
        "import geosr.core.model, geosr.core.sparse as s; "
        "print(s._blas_controller.cache_info().currsize, s._POOL['pool'], len(s._GRAM_CACHE))"
    )
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True)
    assert out.stdout.split() == ["0", "None", "0"]
