"""The two-level anchor search: groups, agreement with the exhaustive search, independence of the batch."""

import numpy as np
import pytest

from geosr.core import anchored
from geosr.core.anchored import anchor_groups, find_anchors, grouped_anchors, nearest_anchors


def unit_atoms(n_atoms, d=30, seed=0):
    rng = np.random.default_rng(seed)
    atoms = rng.standard_normal((d, n_atoms))
    return (atoms / np.linalg.norm(atoms, axis=0)).astype(np.float32)


def features_near(atoms, n, seed=1):
    """Features close to random atoms (as real features are to their anchors), any sign and size."""
    rng = np.random.default_rng(seed)
    pick = rng.integers(0, atoms.shape[1], n)
    f = atoms[:, pick].T * rng.choice([-1.0, 1.0], (n, 1)) + 0.3 * rng.standard_normal((n, atoms.shape[0]))
    return f * 10.0 ** rng.uniform(-2, 3, (n, 1))


def numpy_best_among(features, atoms, allowed):
    """Float64 argmax of |correlation| over the allowed atoms of each feature (numpy reference)."""
    corr = features.astype(np.float64) @ atoms.astype(np.float64)
    corr = np.where(allowed, corr, np.nan)
    return np.nanargmax(np.abs(corr), axis=1)


def test_groups_partition_the_atoms_and_are_deterministic():
    atoms = unit_atoms(1024)
    groups = anchor_groups(atoms)
    assert len(groups.centres) == 64  # twice the square root of the atom count
    np.testing.assert_array_equal(np.sort(groups.members), np.arange(1024))
    assert groups.bounds[0] == 0 and groups.bounds[-1] == 1024 and np.all(np.diff(groups.bounds) >= 0)
    np.testing.assert_allclose(np.linalg.norm(groups.centres, axis=1), 1.0)
    np.testing.assert_array_equal(groups.atoms, atoms.T[groups.members].astype(np.float64))
    again = anchor_groups(atoms)
    np.testing.assert_array_equal(again.members, groups.members)
    np.testing.assert_array_equal(again.centres, groups.centres)


def test_probing_every_group_is_the_exhaustive_search():
    atoms = unit_atoms(256)
    groups = anchor_groups(atoms, n_groups=16)
    features = np.concatenate([features_near(atoms, 4000), np.zeros((3, 30))])
    np.testing.assert_array_equal(grouped_anchors(features, groups, probe=16), nearest_anchors(features, atoms))


def test_answer_is_the_best_atom_of_the_probed_groups():
    atoms = unit_atoms(1024)
    groups = anchor_groups(atoms)
    features = features_near(atoms, 3000)
    got = grouped_anchors(features, groups, probe=3)
    # The probed groups: the three centres of largest |correlation| (numpy reference).
    top = np.argsort(-np.abs(features @ groups.centres.T), axis=1, kind="stable")[:, :3]
    label = np.empty(1024, dtype=np.int64)
    for g in range(len(groups.centres)):
        label[groups.members[groups.bounds[g] : groups.bounds[g + 1]]] = g
    allowed = (label[None, :, None] == top[:, None, :]).any(axis=2)
    assert allowed[np.arange(len(got)), got].all()
    expect = numpy_best_among(features, atoms, allowed)
    # Ties within float32 rounding aside (none are built here), the same atom.
    np.testing.assert_array_equal(got, expect)


def test_answer_does_not_depend_on_the_batch():
    atoms = unit_atoms(1024)
    groups = anchor_groups(atoms)
    features = features_near(atoms, 5000)
    whole = grouped_anchors(features, groups)
    parts = np.concatenate([grouped_anchors(features[a : a + 777], groups) for a in range(0, 5000, 777)])
    np.testing.assert_array_equal(parts, whole)


@pytest.mark.slow
@pytest.mark.parametrize("scale", [2, 3, 4])
def test_grouped_search_costs_under_0_02_db_with_the_shipped_models(monkeypatch, scale):
    # Held-out photo (scikit-image astronaut, luminance by skimage rgb2ycbcr), PSNR by
    # skimage.metrics with a border of `scale` shaved (common practice); the limit is the
    # issue's: the two-level search stays within 0.02 dB of the exhaustive one.
    from skimage import color, data
    from skimage.metrics import peak_signal_noise_ratio

    from geosr.core import synthesis
    from geosr.core.resample import crop_to_multiple, degrade
    from geosr.modelfile import default_model

    model = default_model(scale, "anchored")
    assert model.n_atoms >= anchored.GROUPED_SEARCH_ATOMS
    hr = crop_to_multiple(color.rgb2ycbcr(data.astronaut())[..., 0], scale)
    lr = degrade(hr, scale).astype(np.float32)
    b = slice(scale, -scale)
    grouped = peak_signal_noise_ratio(hr[b, b], np.clip(model.magnify(lr), 0, 255)[b, b], data_range=255)
    monkeypatch.setattr(synthesis, "find_anchors", nearest_anchors)
    exhaustive = peak_signal_noise_ratio(hr[b, b], np.clip(model.magnify(lr), 0, 255)[b, b], data_range=255)
    print(f"x{scale}: grouped {grouped:.3f} dB, exhaustive {exhaustive:.3f} dB")
    assert abs(grouped - exhaustive) < 0.02


@pytest.mark.parametrize("n_atoms, grouped", [(512, False), (1024, True)])
def test_find_anchors_switches_to_two_levels_for_large_dictionaries(monkeypatch, n_atoms, grouped):
    calls = []
    monkeypatch.setattr(anchored, "grouped_anchors", lambda f, g, *a: calls.append(g) or np.zeros(len(f), int))
    find_anchors(features_near(unit_atoms(n_atoms), 10), unit_atoms(n_atoms))
    assert bool(calls) is grouped
