"""Coupled low-/high-resolution dictionaries: training, magnification, model files.

Two ways to synthesize the detail patch of a low-res feature ``f``:

``"sparse"``
    Sparse coding over coupled dictionaries (Zeyde, Elad & Protter 2010):
    ``f ~ D_l a`` with at most ``sparsity`` atoms found by OMP, the patch is
    ``D_h a``. ``D_l`` by K-SVD, ``D_h`` by least squares on the training
    codes.
``"anchored"``
    Anchored neighbourhood regression in its adjusted form (A+, Timofte,
    De Smet & Van Gool 2014): every atom of ``D_l`` anchors a ridge
    regression ``P_j`` learned on the training features most correlated with
    it; the patch is ``P_j f`` for the atom most correlated with ``f``.

Both are positively homogeneous and shift-equivariant in value
(``magnify(c x + b) = c magnify(x) + b`` for ``c > 0``), so one model serves
8-bit, 16-bit and float data without rescaling.

The estimator checks its parameters once per call (:mod:`geosr.core.params`)
and hands them to the functions that do the work: :mod:`geosr.core.pairs`
(training pairs), :mod:`geosr.core.learn` (fitting), :mod:`geosr.core.synthesis`
(magnifying), :mod:`geosr.core.anchored` and :mod:`geosr.core.consistency`.
"""

from __future__ import annotations

import math
import os
from collections.abc import Sequence
from typing import Any

import numpy as np
from sklearn.base import BaseEstimator

from .._validation import check_random_state
from ..enums import Method
from ..errors import InputError, ModelError, NotFittedError
from . import synthesis
from .learn import learn_from_pairs
from .pairs import PairSample, collect_pairs, training_halo
from .params import (
    PARAMETER_NAMES,
    ModelParams,
    check_params,
    header_params,
    model_sha256,
)

__all__ = [
    "CoupledDictionary",
    "PairSample",
    "model_sha256",
]


def _generator(random_state: Any) -> np.random.Generator:
    """The generator a fit draws from (see :func:`geosr._validation.check_random_state`)."""
    if isinstance(random_state, np.random.RandomState):
        # One draw, not check_random_state's four: fits seeded so keep their bits.
        return np.random.default_rng(random_state.randint(0, 2**31 - 1))
    return check_random_state(random_state)


class CoupledDictionary(BaseEstimator):
    """Magnify 2-D images by an integer factor with a learned sparse prior.

    Parameters
    ----------
    scale : int
        Magnification factor, 2 to 8.
    method : {"sparse", "anchored"}
        ``"sparse"``: OMP over coupled K-SVD dictionaries; ``"anchored"``:
        anchored neighbourhood regression (A+), faster and sharper.
    n_atoms : int
        Dictionary size (anchors for ``"anchored"``).
    sparsity : int
        Atoms per patch in OMP (training and the sparse path).
    n_iter : int
        K-SVD iterations; 0 keeps the initial dictionary of training features.
    degradation : {"bicubic", "gaussian", "area"}
        The model that turns high-res training images into low-res ones; it
        should describe how the data to magnify was formed.
    sigma : float, optional
        Gaussian point-spread width in high-res pixels (``"gaussian"`` only).
    max_samples : int
        At most this many training pairs are used (a seeded random subset).
    energy : float
        Fraction of the feature energy the PCA keeps.
    neighbours : int
        Training features per anchor (``"anchored"``).
    ridge : float
        Ridge weight of the anchored regressions.
    rescaled_copies : int
        Training copies of each in-memory reference rescaled by 0.98**k,
        k = 0 .. rescaled_copies - 1 (1 means the reference only).
    high_fit : {"patch", "image"}
        How ``"sparse"`` learns its high-res dictionary: ``"patch"`` by least
        squares on the training patches; ``"image"`` then refines it by
        conjugate gradients so that the overlap-averaged reconstruction of
        dense training tiles matches their detail (the averaging that
        magnification applies is part of the fit).
    random_state : int, numpy Generator or None
        Seed for sample selection and K-SVD.

    Notes
    -----
    The scikit-learn estimator contract holds: the constructor only stores
    its arguments, ``get_params`` / ``set_params`` and
    :func:`sklearn.base.clone` work, and the parameters are checked when
    they are used (at every public method, once per call) by
    :func:`geosr.core.params.check_params`, which raises
    :class:`geosr.errors.ParameterError`. scikit-learn's own parameter
    validation is told to skip them (``_parameter_constraints``), since
    geosr's checks accept a little more (``scale=3.0``, enum members,
    upper-case names) and word their errors in geosr's way.

    Attributes
    ----------
    feature_kernel_ : ndarray, shape (n_features, (2*FEATURE_RADIUS + 1)**2)
        The PCA-projected feature operator on low-res windows.
    pca_eigenvalues_ : ndarray, shape (n_features,)
    dictionary_low_ : ndarray, shape (n_features, n_atoms)
        Unit-norm low-res atoms.
    dictionary_high_ : ndarray, shape ((3*scale)**2, n_atoms)
        High-res detail atoms (``"sparse"``).
    projections_ : ndarray, shape (n_atoms, (3*scale)**2, n_features)
        Anchored regressions (``"anchored"``).
    training_ : dict
        Provenance of the training (image and sample counts, degradation).
    sha256_ : str
        Checksum of the learned arrays, as written in the model file.
    """

    #: scikit-learn's parameter declaration: geosr checks every parameter itself.
    _parameter_constraints: dict = {name: "no_validation" for name in PARAMETER_NAMES}

    def __init__(
        self,
        scale: int = 3,
        method: str = "sparse",
        n_atoms: int = 1000,
        sparsity: int = 3,
        n_iter: int = 40,
        degradation: str = "bicubic",
        sigma: float | None = None,
        max_samples: int = 100_000,
        energy: float = 0.999,
        neighbours: int = 2048,
        ridge: float = 0.1,
        rescaled_copies: int = 1,
        high_fit: str = "patch",
        random_state: Any = 0,
    ) -> None:
        self.scale = scale
        self.method = method
        self.n_atoms = n_atoms
        self.sparsity = sparsity
        self.n_iter = n_iter
        self.degradation = degradation
        self.sigma = sigma
        self.max_samples = max_samples
        self.energy = energy
        self.neighbours = neighbours
        self.ridge = ridge
        self.rescaled_copies = rescaled_copies
        self.high_fit = high_fit
        self.random_state = random_state

    # ------------------------------------------------------------------ state
    def _params(self) -> ModelParams:
        """The parameters, checked (ParameterError) and normalised."""
        return check_params(self.get_params(deep=False))

    def _check_fitted(self) -> None:
        if not hasattr(self, "feature_kernel_"):
            raise NotFittedError(
                "This CoupledDictionary is not fitted yet; call fit() or load a model file first"
            )

    def _arrays(self) -> dict[str, np.ndarray]:
        """The learned arrays by their model-file names."""
        self._check_fitted()
        arrays = {
            "feature_kernel": self.feature_kernel_,
            "pca_eigenvalues": self.pca_eigenvalues_,
            "dictionary_low": self.dictionary_low_,
        }
        if Method.parse(self.method, "method") is Method.SPARSE:
            arrays["dictionary_high"] = self.dictionary_high_
        else:
            arrays["projections"] = self.projections_
        return arrays

    def _header(self) -> dict[str, Any]:
        """This model's entry in a model file's JSON header."""
        return {
            "params": header_params(self.get_params()),
            "training": self.training_,
            "sha256": self.sha256_,
        }

    # ----------------------------------------------------------------- context
    def context_radius(self, consistency: bool = False, masked: bool = False) -> int:
        """Low-res pixels of context one output block needs on each side.

        Parameters
        ----------
        consistency : bool
            Whether measurement consistency will be enforced.
        masked : bool
            Whether some input pixels are invalid (they are filled first).

        Returns
        -------
        int
            The radius R: the output of a window depends on input pixels at
            most R low-res pixels away from it. It is the feature radius plus
            one ring of patch centres, plus the fill distance when masked,
            plus the reach of the consistency step.
        """
        return synthesis.context_radius(self._params(), consistency=consistency, masked=masked)

    def training_halo(self) -> int:
        """High-res pixels of context per side that :meth:`collect_pairs` needs.

        A multiple of the scale: the degradation support plus the feature
        radius, so that features near a window edge are those the whole
        image would give.
        """
        return training_halo(self._params())

    # ---------------------------------------------------------------- training
    def collect_pairs(
        self,
        hr_block: np.ndarray,
        halo: int,
        valid: np.ndarray | None = None,
        max_pairs: int | None = None,
        random_state: Any = None,
    ) -> PairSample:
        """Collect training pairs from a high-res window with context.

        Parameters
        ----------
        hr_block : ndarray, shape (rows + 2*halo, cols + 2*halo)
            High-res reference window with ``halo`` pixels of real context on
            each side (symmetric extension where it leaves the image).
            ``rows`` and ``cols`` are cropped down to multiples of the scale.
        halo : int
            At least :meth:`training_halo`.
        valid : ndarray of bool, same shape, optional
            Measured pixels; patches whose context touches an invalid pixel
            are skipped, and so are non-finite pixels.
        max_pairs : int, optional
            Keep at most this many pairs (a seeded random subset).
        random_state : int, Generator or None
            Defaults to the model's ``random_state``.

        Returns
        -------
        PairSample
            Values are divided by the standard deviation of the valid
            interior so that references of any dynamic range weigh alike.
        """
        p = self._params()
        rng = _generator(self.random_state if random_state is None else random_state)
        return collect_pairs(p, hr_block, halo, valid, max_pairs, rng)

    def fit(self, images: Sequence[np.ndarray], valid: Sequence[np.ndarray] | None = None) -> CoupledDictionary:
        """Learn the dictionaries from high-res training images.

        Parameters
        ----------
        images : sequence of ndarray, each shape (rows, cols)
            High-res references (any real dtype); each is cropped to a
            multiple of the scale. Bootstrapping from a scene is
            ``fit([scene])`` followed by ``magnify(scene)``.
        valid : sequence of bool ndarray, optional
            Measured pixels of each image.

        Returns
        -------
        self
        """
        p = self._params()
        images, valid = _check_training_images(images, valid)
        rng = _generator(self.random_state)
        halo = training_halo(p)
        per_image = max(1, int(math.ceil(p.max_samples * 1.5 / len(images))))
        samples = []
        for n, image in enumerate(images):
            image = np.asarray(image)
            if image.ndim != 2 or not np.issubdtype(image.dtype, np.number) or np.iscomplexobj(image):
                raise InputError(
                    f"Training image {n} must be a 2-D real array, got shape {image.shape} "
                    f"and dtype {image.dtype}"
                )
            mask = None if valid is None else np.asarray(valid[n], dtype=bool)
            rows = image.shape[0] - image.shape[0] % p.scale
            cols = image.shape[1] - image.shape[1] % p.scale
            image = image[:rows, :cols]
            if mask is not None:
                mask = np.pad(mask[:rows, :cols], halo, mode="symmetric")
            block = np.pad(image.astype(np.float64), halo, mode="symmetric")
            samples.append(collect_pairs(p, block, halo, mask, per_image, rng))
        return self._fit_pairs(p, samples)

    def fit_pairs(self, samples: Sequence[PairSample]) -> CoupledDictionary:
        """Learn the dictionaries from collected training pairs.

        Parameters
        ----------
        samples : sequence of PairSample
            From :meth:`collect_pairs`, all at this model's scale.

        Returns
        -------
        self
        """
        return self._fit_pairs(self._params(), samples)

    def _fit_pairs(self, p: ModelParams, samples: Sequence[PairSample]) -> CoupledDictionary:
        arrays, training = learn_from_pairs(p, samples, _generator(self.random_state))
        for name in ("dictionary_high_", "projections_"):
            if hasattr(self, name):
                delattr(self, name)
        for name, value in arrays.items():
            setattr(self, name + "_", value)
        self.training_ = training
        self.sha256_ = model_sha256(self._arrays(), header_params(self.get_params()))
        return self

    # ------------------------------------------------------------- magnifying
    def magnify(self, image: np.ndarray, valid: np.ndarray | None = None, *,
                consistency: bool = False, ensemble: bool = False) -> np.ndarray:
        """Magnify a whole 2-D image.

        Parameters
        ----------
        image : ndarray, shape (h, w)
            Low-res image, any real dtype. Non-finite pixels are invalid.
        valid : ndarray of bool, shape (h, w), optional
            Measured pixels; invalid ones never influence valid outputs.
        consistency : bool
            Enforce that degrading the output reproduces the input.
        ensemble : bool
            Average over the eight flips and rotations.

        Returns
        -------
        ndarray, shape (scale*h, scale*w)
            float32 for float32 input, float64 otherwise; NaN under invalid
            input pixels (magnified by nearest neighbour).
        """
        arrays = self._arrays()
        return synthesis.magnify(self._params(), arrays, image, valid,
                                 consistency=consistency, ensemble=ensemble)

    def magnify_block(self, block: np.ndarray, halo: int, valid: np.ndarray | None = None, *,
                      consistency: bool = False, ensemble: bool = False,
                      return_residual: bool = False) -> np.ndarray | tuple[np.ndarray, np.ndarray]:
        """Magnify one window that carries its own context.

        Parameters
        ----------
        block : ndarray, shape (h + 2*halo, w + 2*halo)
            The low-res window plus ``halo`` pixels of context on each side;
            outside the image the context is the symmetric extension of what
            was read.
        halo : int
            At least :meth:`context_radius` for the same options (with
            ``masked=True`` when ``valid`` marks invalid pixels).
        valid : ndarray of bool, same shape, optional
            Measured pixels.
        consistency, ensemble : bool
            As in :meth:`magnify`.
        return_residual : bool
            Also return the consistency residual (needs ``consistency``).

        Returns
        -------
        out : ndarray, shape (scale*h, scale*w)
            Exactly the part of ``magnify(whole_image)`` that covers the
            window, to float rounding. Values under invalid pixels are
            meaningless.
        residual : ndarray, shape (h, w)
            Only with ``return_residual``: ``degrade(output) - input`` on the
            window's low-res cells, degrading the whole-image output (the
            context makes it exact at the window's edges). Meaningless at
            invalid pixels.
        """
        arrays = self._arrays()
        return synthesis.magnify_block(
            self._params(), arrays, block, halo, valid, consistency=consistency,
            ensemble=ensemble, return_residual=return_residual,
        )

    def interpolate(self, image: np.ndarray, valid: np.ndarray | None = None) -> np.ndarray:
        """The interpolation that :meth:`magnify` adds its detail to.

        Parameters
        ----------
        image : ndarray, shape (h, w)
        valid : ndarray of bool, shape (h, w), optional

        Returns
        -------
        ndarray, shape (scale*h, scale*w)
            float32 for float32 input, float64 otherwise.
        """
        self._check_fitted()
        return synthesis.interpolate(self._params(), image, valid)

    def interpolate_block(self, block: np.ndarray, halo: int, valid: np.ndarray | None = None, *,
                          consistency: bool = False) -> np.ndarray:
        """The interpolation that :meth:`magnify_block` adds its detail to.

        Parameters
        ----------
        block, halo, valid, consistency :
            As in :meth:`magnify_block` (``consistency`` only decides the
            halo the block must carry).

        Returns
        -------
        ndarray, shape (scale*h, scale*w)
            Bicubic interpolation of the window (invalid pixels filled the
            same way as for magnifying); the detail of ``magnify_block`` is
            its output minus this.
        """
        self._check_fitted()
        return synthesis.interpolate_block(self._params(), block, halo, valid, consistency=consistency)

    # ----------------------------------------------------------------- files
    def save(self, path: str | os.PathLike) -> None:
        """Write the model to an ``.npz`` file (see :func:`geosr.modelfile.save_models`)."""
        from ..modelfile import save_models

        save_models(path, [self])

    @classmethod
    def load(cls, path: str | os.PathLike) -> CoupledDictionary:
        """Read a model file holding one model (see :func:`geosr.modelfile.load_models`)."""
        from ..modelfile import load_models

        models = load_models(path)
        if len(models) != 1:
            raise ModelError(
                f"The model file {os.fspath(path)!r} must hold one model, got {len(models)} "
                "per-band models; use geosr.load_models()"
            )
        return models[0]


def _check_training_images(images, valid):
    """The training images (and masks) as lists, or InputError."""
    if isinstance(images, np.ndarray) and images.ndim == 2:
        raise InputError(
            "The 'images' parameter must be a sequence of 2-D arrays, got one 2-D array; "
            "pass [image]"
        )
    images = list(images)
    if not images:
        raise InputError("The 'images' parameter must hold at least one image, got none")
    if valid is not None:
        valid = list(valid)
        if len(valid) != len(images):
            raise InputError(
                f"The 'valid' parameter must hold one mask per image ({len(images)}), "
                f"got {len(valid)}"
            )
    return images, valid
