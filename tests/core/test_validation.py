"""Tests of geosr._validation: the shared checks, limits and helpers."""

import os
import subprocess
import sys
from fractions import Fraction

import numpy as np
import pytest

from geosr import _validation as v
from geosr.errors import ParameterError

# --------------------------------------------------------------------------
# limits and import cost


def test_limits():
    assert (v.SCALE_MIN, v.SCALE_MAX, v.MIN_CHUNK) == (2, 8, 16)


def test_import_is_cheap():
    code = (
        "import sys, geosr._validation as v; "
        "heavy = ['numpy', 'rasterio', 'dask', 'sklearn', 'click', 'scipy', 'numba']; "
        "print(','.join(m for m in heavy if m in sys.modules))"
    )
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True)
    assert out.stdout.strip() == ""


def test_all_names_exist():
    for name in v.__all__:
        assert hasattr(v, name), name


# --------------------------------------------------------------------------
# check_int


@pytest.mark.parametrize("value", [5, np.int8(5), np.int64(5), np.uint16(5), np.intp(5)])
def test_check_int_accepts_integers(value):
    out = v.check_int(value, "n", 1, 10)
    assert out == 5 and type(out) is int


def test_check_int_without_bounds():
    assert v.check_int(-(10**20), "n") == -(10**20)
    assert v.check_int(7, "n", high=7) == 7
    assert v.check_int(7, "n", low=7) == 7


@pytest.mark.parametrize("value", [True, False, np.bool_(True), 2.0, 2.5, np.float64(3.0), "3", None, [3]])
def test_check_int_refuses_non_integers(value):
    with pytest.raises(ParameterError, match=r"^The 'n_atoms' parameter must be an integer") as info:
        v.check_int(value, "n_atoms", 1, 10)
    assert info.value.args[0].endswith(f", got {value!r}")
    assert isinstance(info.value, ValueError)  # callers that catch ValueError keep working


@pytest.mark.parametrize(
    "low, high, value, message",
    [
        (2, 100_000, 0, "The 'n_atoms' parameter must be an integer from 2 to 100000, got 0"),
        (2, 100_000, 100_001, "The 'n_atoms' parameter must be an integer from 2 to 100000, got 100001"),
        (10, None, 9, "The 'n_atoms' parameter must be an integer of at least 10, got 9"),
        (None, 4, 5, "The 'n_atoms' parameter must be an integer of at most 4, got 5"),
        # numpy scalars are reported as the plain integer
        (10, None, np.int64(9), "The 'n_atoms' parameter must be an integer of at least 10, got 9"),
    ],
)
def test_check_int_range_messages(low, high, value, message):
    with pytest.raises(ParameterError) as info:
        v.check_int(value, "n_atoms", low, high)
    assert str(info.value) == message


def test_check_int_what_and_integral_float():
    with pytest.raises(ParameterError, match=r"from 1 to 30 \(at most n_features = 30\), got 31$"):
        v.check_int(31, "n_nonzero", 1, 30, what="at most n_features = 30")
    assert v.check_int(4.0, "chunk", 1, integral_float=True) == 4
    assert type(v.check_int(np.float32(4.0), "chunk", integral_float=True)) is int
    for bad in (4.5, float("inf"), float("nan"), True, "4"):
        with pytest.raises(ParameterError, match="'chunk' parameter must be an integer"):
            v.check_int(bad, "chunk", 1, integral_float=True)


# --------------------------------------------------------------------------
# check_float


@pytest.mark.parametrize("value", [0.5, np.float32(0.5), np.float64(0.5), Fraction(1, 2)])
def test_check_float_accepts_reals(value):
    out = v.check_float(value, "energy", 0.0, 1.0, low_open=True)
    assert out == 0.5 and type(out) is float


def test_check_float_accepts_integers():
    assert v.check_float(1, "ridge", 0.0, 1e6) == 1.0
    assert type(v.check_float(np.int32(3), "ridge")) is float


def test_check_float_bounds():
    assert v.check_float(0.0, "x", 0.0, 1.0) == 0.0
    assert v.check_float(1.0, "x", 0.0, 1.0) == 1.0
    with pytest.raises(ParameterError):
        v.check_float(0.0, "x", 0.0, 1.0, low_open=True)
    with pytest.raises(ParameterError):
        v.check_float(1.0, "x", 0.0, 1.0, high_open=True)
    assert v.check_float(89.9, "x", 0, 90, high_open=True) == 89.9
    assert v.check_float(-1e300, "x") == -1e300


@pytest.mark.parametrize(
    "kwargs, value, message",
    [
        # the wording of model._check_float, unchanged
        (dict(low=0.0, high=1.0, low_open=True), 0.0,
         "The 'energy' parameter must be a number greater than 0.0 and at most 1.0, got 0.0"),
        (dict(low=0.0, high=1.0), 1.5,
         "The 'energy' parameter must be a number at least 0.0 and at most 1.0, got 1.5"),
        (dict(low=0, high=90, high_open=True), 90,
         "The 'energy' parameter must be a number at least 0 and less than 90, got 90"),
        (dict(low=0, low_open=True), -2.0,
         "The 'energy' parameter must be a finite number greater than 0, got -2.0"),
        (dict(high=1), 2, "The 'energy' parameter must be a finite number at most 1, got 2"),
        (dict(), float("inf"), "The 'energy' parameter must be a finite number, got inf"),
        (dict(), float("nan"), "The 'energy' parameter must be a finite number, got nan"),
        (dict(low=0.0, high=1.0), True,
         "The 'energy' parameter must be a number at least 0.0 and at most 1.0, got True"),
        (dict(low=0.0, high=1.0), "0.5",
         "The 'energy' parameter must be a number at least 0.0 and at most 1.0, got '0.5'"),
        (dict(), None, "The 'energy' parameter must be a finite number, got None"),
    ],
)
def test_check_float_messages(kwargs, value, message):
    with pytest.raises(ParameterError) as info:
        v.check_float(value, "energy", **kwargs)
    assert str(info.value) == message


def test_check_float_refuses_numpy_bool():
    with pytest.raises(ParameterError, match="'x' parameter must be a finite number"):
        v.check_float(np.bool_(True), "x")


# --------------------------------------------------------------------------
# check_bool


@pytest.mark.parametrize(
    "value, expected",
    [(True, True), (False, False), (np.bool_(True), True), (np.bool_(False), False)],
)
def test_check_bool_accepts_flags(value, expected):
    out = v.check_bool(value, "overwrite")
    assert out is expected


@pytest.mark.parametrize("value", [0, 1, np.int64(1), 1.0, "yes", "True", None])
def test_check_bool_refuses_others(value):
    with pytest.raises(ParameterError) as info:
        v.check_bool(value, "overwrite")
    assert str(info.value) == f"The 'overwrite' parameter must be True or False, got {value!r}"


# --------------------------------------------------------------------------
# check_scale


@pytest.mark.parametrize("value", [2, 3, 8, np.int16(4), np.uint8(4), 3.0, np.float32(5.0)])
def test_check_scale_accepts(value):
    out = v.check_scale(value)
    assert out == int(value) and type(out) is int


@pytest.mark.parametrize("value", [0, 1, -2, 9, 2.5, "3", True, np.bool_(True), None, 9.0, float("nan")])
def test_check_scale_refuses(value):
    # "'scale' parameter" is the fragment tests/test_resample.py matches.
    with pytest.raises(ParameterError, match="^The 'scale' parameter must be an integer from 2 to 8, got "):
        v.check_scale(value)


def test_check_scale_messages_and_name():
    with pytest.raises(ParameterError) as info:
        v.check_scale(2.5)
    assert str(info.value) == "The 'scale' parameter must be an integer from 2 to 8, got 2.5"
    with pytest.raises(ParameterError) as info:
        v.check_scale(9.0)  # an integral float is reported as the integer
    assert str(info.value) == "The 'scale' parameter must be an integer from 2 to 8, got 9"
    with pytest.raises(ParameterError, match="^The 'factor' parameter"):
        v.check_scale(1, name="factor")


# --------------------------------------------------------------------------
# check_random_state


def _draws(rng):
    return rng.integers(0, 2**31, size=8)


@pytest.mark.parametrize("seed", [0, 7, np.int64(7), np.uint32(123), 2**40])
def test_random_state_same_seed_same_draws(seed):
    a, b = v.check_random_state(seed), v.check_random_state(seed)
    assert isinstance(a, np.random.Generator) and a is not b
    np.testing.assert_array_equal(_draws(a), _draws(b))
    # an integer seed is exactly numpy's default_rng of it
    ref = np.random.default_rng(int(seed))
    np.testing.assert_array_equal(_draws(v.check_random_state(seed)), _draws(ref))


def test_random_state_different_seeds_differ():
    assert not np.array_equal(_draws(v.check_random_state(1)), _draws(v.check_random_state(2)))


def test_random_state_none_is_fresh():
    a, b = v.check_random_state(None), v.check_random_state(None)
    assert isinstance(a, np.random.Generator)
    assert not np.array_equal(_draws(a), _draws(b))


def test_random_state_generator_passes_through():
    gen = np.random.default_rng(3)
    assert v.check_random_state(gen) is gen


def test_random_state_from_random_state():
    a = v.check_random_state(np.random.RandomState(5))
    b = v.check_random_state(np.random.RandomState(5))
    np.testing.assert_array_equal(_draws(a), _draws(b))
    # seeded with four 31-bit draws of the RandomState (as geosr.core.sparse always has)
    ref = np.random.default_rng(np.random.RandomState(5).randint(0, 2**31 - 1, size=4))
    np.testing.assert_array_equal(_draws(v.check_random_state(np.random.RandomState(5))), _draws(ref))
    rs = np.random.RandomState(5)
    v.check_random_state(rs)
    assert rs.randint(0, 10**9) != np.random.RandomState(5).randint(0, 10**9)  # it advanced


def test_random_state_seed_sequence_and_bit_generator():
    a = v.check_random_state(np.random.SeedSequence(9))
    np.testing.assert_array_equal(_draws(a), _draws(np.random.default_rng(np.random.SeedSequence(9))))
    bitgen = np.random.PCG64(9)
    assert v.check_random_state(bitgen).bit_generator is bitgen


@pytest.mark.parametrize("value", ["seed", 1.5, 3.0, True, np.bool_(False), [1, 2], object()])
def test_random_state_refuses_other_types(value):
    with pytest.raises(ParameterError) as info:
        v.check_random_state(value)
    assert str(info.value) == (
        "The 'random_state' parameter must be None, an integer, a numpy Generator or RandomState, "
        f"got {value!r}"
    )


def test_random_state_refuses_negative():
    message = "^The 'random_state' parameter must be a non-negative integer, got -3$"
    with pytest.raises(ParameterError, match=message):
        v.check_random_state(-3)
    with pytest.raises(ParameterError, match="^The 'seed' parameter"):
        v.check_random_state(-1, name="seed")


# --------------------------------------------------------------------------
# working_dtype


F32, F64 = np.dtype(np.float32), np.dtype(np.float64)


@pytest.mark.parametrize(
    "dtypes, expected",
    [
        (["float32"], F32),
        (["float64"], F64),
        (["float16"], F64),
        (["uint8"], F64),
        (["int16"], F64),
        (["uint16"], F64),
        (["int64"], F64),
        (["bool"], F64),
        (["complex64"], F64),
        (["float32", "float32"], F32),
        (["float32", "float32", "float32"], F32),
        (["float32", "float64"], F64),
        (["float64", "float32"], F64),
        (["float32", "uint16"], F64),
    ],
)
def test_working_dtype_table(dtypes, expected):
    arrays = [np.zeros((2, 3), dtype=d) for d in dtypes]
    out = v.working_dtype(*arrays)
    assert isinstance(out, np.dtype) and out == expected
    # dtypes, dtype names and scalar types give the same answer
    assert v.working_dtype(*[np.dtype(d) for d in dtypes]) == expected
    assert v.working_dtype(*dtypes) == expected
    assert v.working_dtype(*[np.dtype(d).type for d in dtypes]) == expected


def test_working_dtype_array_likes_and_empty():
    assert v.working_dtype([1.0, 2.0]) == F64
    assert v.working_dtype(np.float32(1.0)) == F32
    assert v.working_dtype(np.zeros(3, np.float32), [[1, 2]]) == F64
    with pytest.raises(TypeError):
        v.working_dtype()


# --------------------------------------------------------------------------
# crop_to_multiple / cropped_shape


@pytest.mark.parametrize(
    "shape, scale, expected",
    [
        ((10, 11), 3, (9, 9)),
        ((9, 9), 3, (9, 9)),
        ((17, 16), 2, (16, 16)),
        ((4, 15, 23), 4, (4, 12, 20)),
        ((2, 3, 16, 17), 8, (2, 3, 16, 16)),
        ((5, 7), 8, (0, 0)),
    ],
)
def test_crop_to_multiple_shapes(shape, scale, expected):
    image = np.arange(np.prod(shape)).reshape(shape)
    out = v.crop_to_multiple(image, scale)
    assert out.shape == expected
    # the top-left part, as a view of the input
    np.testing.assert_array_equal(out, image[..., : expected[-2], : expected[-1]])
    assert out.size == 0 or np.shares_memory(out, image)
    assert v.cropped_shape(shape[-2], shape[-1], scale) == expected[-2:]


def test_crop_to_multiple_takes_lists_and_checks_scale():
    out = v.crop_to_multiple([[1, 2, 3], [4, 5, 6], [7, 8, 9]], 2)
    np.testing.assert_array_equal(out, [[1, 2], [4, 5]])
    assert v.crop_to_multiple(np.zeros((9, 10)), 3.0).shape == (9, 9)
    for bad in (1, 9, 2.5, True):
        with pytest.raises(ParameterError, match="'scale' parameter"):
            v.crop_to_multiple(np.zeros((10, 10)), bad)
        with pytest.raises(ParameterError, match="'scale' parameter"):
            v.cropped_shape(10, 10, bad)


# --------------------------------------------------------------------------
# cpu_count


def test_cpu_count():
    n = v.cpu_count()
    assert type(n) is int and n >= 1
    assert n <= (os.cpu_count() or n)
    if hasattr(os, "sched_getaffinity"):
        assert n == len(os.sched_getaffinity(0))


def test_cpu_count_without_affinity(monkeypatch):
    monkeypatch.delattr(os, "sched_getaffinity", raising=False)
    monkeypatch.setattr(os, "cpu_count", lambda: None)
    assert v.cpu_count() == 1
    monkeypatch.setattr(os, "cpu_count", lambda: 6)
    assert v.cpu_count() == 6


def test_cpu_count_when_affinity_fails(monkeypatch):
    def broken(pid):
        raise OSError("no affinity")

    monkeypatch.setattr(os, "sched_getaffinity", broken, raising=False)
    monkeypatch.setattr(os, "cpu_count", lambda: 3)
    assert v.cpu_count() == 3
