"""Fixed choices, one enum each; the command line builds its choices from them."""

from enum import Enum

__all__ = ["Degradation", "Method"]


class _StrEnum(str, Enum):
    def __str__(self):
        return self.value

    @classmethod
    def parse(cls, value, name):
        """Return the member for ``value`` or raise ParameterError naming ``name``."""
        from .errors import ParameterError

        if isinstance(value, cls):
            return value
        try:
            return cls(str(value).lower())
        except ValueError:
            allowed = ", ".join(repr(m.value) for m in cls)
            raise ParameterError(
                f"The {name!r} parameter must be one of {allowed}, got {value!r}"
            ) from None


class Degradation(_StrEnum):
    """How a high-resolution image becomes a low-resolution one."""

    BICUBIC = "bicubic"  # antialiased bicubic (Keys, a = -0.5, stretched by the scale)
    GAUSSIAN = "gaussian"  # Gaussian point-spread function, then decimation
    AREA = "area"  # mean of each scale x scale block


class Method(_StrEnum):
    """How the fine detail is synthesized."""

    SPARSE = "sparse"  # OMP over the coupled K-SVD dictionaries
    ANCHORED = "anchored"  # anchored neighbourhood regression (A+)
