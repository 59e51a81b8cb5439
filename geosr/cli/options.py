"""Options shared by the ``geosr`` subcommands, and the checks behind them.

Every check turns a bad value into :class:`click.BadParameter` (exit 2) with
a message that names the option, the value and what is allowed. Values can
also come from a TOML file given with ``--config``; a bad value from the file
is reported with the file and the key instead of the option.

This module imports nothing heavy (no numpy, no rasterio), so that
``geosr --help`` stays fast.
"""

from __future__ import annotations

import re

import click
from click.core import ParameterSource

from .._validation import MAX_BAND, MIN_CHUNK, SCALE_MAX, SCALE_MIN
from ..enums import Degradation, Method
from .config import Key, load_config

__all__ = [
    "model_source_options",
    "sigma_option",
    "ScaleType",
    "IntAtLeast",
    "BandsType",
    "KeyValueType",
    "SchedulerAddress",
    "EnumChoice",
    "ByteSize",
    "scale_option",
    "method_option",
    "degradation_option",
    "bands_option",
    "guide_option",
    "guide_bands_option",
    "chunk_option",
    "workers_option",
    "scheduler_option",
    "quiet_option",
    "overwrite_option",
    "spectral_guard_option",
    "config_option",
    "config_schema",
    "exclusive",
    "workers_and_scheduler",
    "report",
]

#: The subcommands that may have a table of their own in a config file.
COMMANDS = ("train", "magnify", "assess", "describe", "demo")

_CONFIG_META = "geosr.config_path"


def _from_config(ctx, param):
    """True when the value of ``param`` came from the ``--config`` file."""
    if ctx is None or param is None or param.name is None:
        return False
    return ctx.get_parameter_source(param.name) == ParameterSource.DEFAULT_MAP and (
        _CONFIG_META in ctx.meta
    )


def option_key(param):
    """The config key of a click option: its long name without the dashes."""
    longs = [o for o in param.opts if o.startswith("--")]
    return (longs[0] if longs else param.opts[0]).lstrip("-")


def _fail_from_config(message, param, ctx):
    """Raise the config-file form of a bad value when it came from the file."""
    if _from_config(ctx, param):
        raise click.UsageError(
            f"Invalid value for the key {option_key(param)!r} in the config file "
            f"{ctx.meta[_CONFIG_META]}: {message}",
            ctx=ctx,
        )


class _GeosrType(click.ParamType):
    """Base of the geosr parameter types: failures name the config key when
    the value came from the ``--config`` file."""

    #: How the config loader checks a TOML value for this type.
    config_kind = "str"

    def fail(self, message, param=None, ctx=None):
        _fail_from_config(message, param, ctx)
        super().fail(message, param, ctx)


class ScaleType(_GeosrType):
    """An integer scale factor from 2 to 8."""

    name = "integer"
    config_kind = "int"

    def convert(self, value, param, ctx):
        if isinstance(value, bool):
            self.fail(self._message(value), param, ctx)
        if isinstance(value, int):
            scale = value
        else:
            text = str(value).strip()
            if not re.fullmatch(r"[+-]?\d+", text):
                self.fail(self._message(value), param, ctx)
            scale = int(text)
        if not SCALE_MIN <= scale <= SCALE_MAX:
            self.fail(self._message(value), param, ctx)
        return scale

    @staticmethod
    def _message(value):
        return f"must be an integer from {SCALE_MIN} to {SCALE_MAX}, got {value!r}"


class IntAtLeast(_GeosrType):
    """An integer of at least ``minimum``."""

    name = "integer"
    config_kind = "int"

    def __init__(self, minimum=1):
        self.minimum = minimum

    def convert(self, value, param, ctx):
        message = f"must be an integer of at least {self.minimum}, got {value!r}"
        if isinstance(value, bool):
            self.fail(message, param, ctx)
        if isinstance(value, int):
            number = value
        else:
            text = str(value).strip()
            if not re.fullmatch(r"[+-]?\d+", text):
                self.fail(message, param, ctx)
            number = int(text)
        if number < self.minimum:
            self.fail(message, param, ctx)
        return number


class BandsType(_GeosrType):
    """Band numbers starting at 1: ``"1,2,4"``, ``"1-3"`` (or a TOML array of integers).

    Parsed in time linear in the number of bands; a band above
    :data:`~geosr._validation.MAX_BAND` is refused before a range is
    expanded (the raster's own band count is checked when it is opened).
    """

    name = "list"
    config_kind = "bands"

    def convert(self, value, param, ctx):
        message = (
            "must be distinct band numbers starting at 1, as '1,2,4' or '1-3', "
            f"got {value!r}"
        )
        if isinstance(value, tuple) and all(type(v) is int for v in value):
            return value  # already converted
        items = list(value) if isinstance(value, (list, tuple)) else [
            s.strip() for s in str(value).split(",")]
        bands: list[int] = []
        seen: set[int] = set()
        for item in items:
            lo, hi = self._bounds(item, message, param, ctx)
            if hi > MAX_BAND:
                self.fail(f"must be band numbers from 1 to {MAX_BAND} (no raster has more "
                          f"bands), got {value!r}", param, ctx)
            numbers = range(lo, hi + 1)
            if lo < 1 or not seen.isdisjoint(numbers):
                self.fail(message, param, ctx)
            seen.update(numbers)
            bands.extend(numbers)
        if not bands:
            self.fail(message, param, ctx)
        return tuple(bands)

    def _bounds(self, item, message, param, ctx):
        """First and last band of one item (a number or a range ``lo-hi``)."""
        if isinstance(item, bool):
            self.fail(message, param, ctx)
        if isinstance(item, int):
            return item, item
        match = re.fullmatch(r"(\d+)(?:\s*-\s*(\d+))?", str(item))
        if match is None:
            self.fail(message, param, ctx)
        lo = int(match[1])
        hi = int(match[2]) if match[2] else lo
        if hi < lo:
            self.fail(message, param, ctx)
        return lo, hi


_CO_KEY = re.compile(r"[A-Za-z_][A-Za-z0-9_]*")


class KeyValueType(_GeosrType):
    """A GDAL creation option ``KEY=VALUE``; returns ``(KEY, VALUE)``."""

    name = "KEY=VALUE"
    config_kind = "key-value"

    def convert(self, value, param, ctx):
        if isinstance(value, tuple) and len(value) == 2:
            return value
        text = str(value)
        key, sep, val = text.partition("=")
        if not sep or not _CO_KEY.fullmatch(key.strip()) or not val.strip():
            self.fail(
                f"must be KEY=VALUE with a name of letters, digits and underscores, "
                f"e.g. COMPRESS=ZSTD, got {text!r}",
                param,
                ctx,
            )
        return key.strip().upper(), val.strip()


_ADDRESS = re.compile(
    r"(?P<scheme>[a-z]+)://(?P<host>\[[0-9A-Fa-f:.]+\]|[A-Za-z0-9_.-]+)(?::(?P<port>\d{1,5}))?"
)
_SCHEMES = ("tcp", "tls", "ucx", "ws", "wss", "inproc")
#: Schedulers on this machine that --scheduler also names.
LOCAL_SCHEDULERS = ("threads", "processes", "synchronous")


class SchedulerAddress(_GeosrType):
    """A local scheduler name or the address of a running dask.distributed scheduler."""

    name = "address"
    config_kind = "str"

    def convert(self, value, param, ctx):
        text = str(value).strip()
        if text.lower() in LOCAL_SCHEDULERS:
            return text.lower()
        match = _ADDRESS.fullmatch(text)
        ok = match is not None and match["scheme"] in _SCHEMES
        if ok and match["port"] is not None and not 0 < int(match["port"]) < 65536:
            ok = False
        if not ok:
            self.fail(
                f"must be {', '.join(repr(s) for s in LOCAL_SCHEDULERS)} or a dask scheduler "
                f"address SCHEME://HOST[:PORT] with SCHEME one of {', '.join(_SCHEMES)}, "
                f"e.g. tcp://10.0.0.5:8786, got {text!r}",
                param,
                ctx,
            )
        return text


_BYTE_UNITS = {"": 1, "B": 1, "K": 2**10, "M": 2**20, "G": 2**30, "T": 2**40}


class ByteSize(_GeosrType):
    """A size in bytes: ``500M``, ``300G``, ``1.5T`` or a plain number of bytes."""

    name = "size"
    config_kind = "size"

    def convert(self, value, param, ctx):
        if isinstance(value, int) and not isinstance(value, bool) and value > 0:
            return value
        text = str(value).strip().upper().replace("IB", "").rstrip("B") if not isinstance(value, bool) else ""
        match = re.fullmatch(r"(\d+(?:\.\d+)?)\s*([KMGT]?)", text)
        if match is None or float(match[1]) <= 0:
            self.fail(f"must be a size such as 500M, 300G or 2T, got {value!r}", param, ctx)
        return int(float(match[1]) * _BYTE_UNITS[match[2]])


class EnumChoice(click.Choice):
    """A case-insensitive choice whose config failures name the key."""

    config_kind = "choice"

    def __init__(self, enum):
        super().__init__([m.value for m in enum], case_sensitive=False)

    def fail(self, message, param=None, ctx=None):
        _fail_from_config(message, param, ctx)
        super().fail(message, param, ctx)


# ----------------------------------------------------------------- options


def scale_option(required=True, help=None):
    return click.option(
        "--scale",
        "-s",
        type=ScaleType(),
        required=required,
        help=help or f"Integer magnification factor, {SCALE_MIN} to {SCALE_MAX}.",
    )


def model_source_options(source, model_help):
    """``--model``, ``--self-train``, ``--atoms`` and ``--samples``, shared by commands.

    ``source`` names the argument that self-training learns from (``SRC``,
    ``REFERENCE``); ``model_help`` describes ``--model`` for that command.
    """
    decorators = [
        click.option(
            "--model",
            "-m",
            type=click.Path(exists=True, dir_okay=False),
            default=None,
            metavar="MODEL",
            help=model_help,
        ),
        click.option(
            "--self-train",
            is_flag=True,
            default=False,
            help=f"Learn the model from {source} itself (degrade it, learn, apply) instead of --model.",
        ),
        click.option(
            "--atoms",
            "train_atoms",
            type=IntAtLeast(2),
            default=None,
            metavar="N",
            help="With --self-train: dictionary size.",
        ),
        click.option(
            "--samples",
            "train_samples",
            type=IntAtLeast(10),
            default=None,
            metavar="N",
            help=f"With --self-train (or --guide): training samples drawn from {source}.",
        ),
    ]

    def decorate(func):
        for decorator in reversed(decorators):
            func = decorator(func)
        return func

    return decorate


sigma_option = click.option(
    "--sigma",
    type=click.FloatRange(min=0.0, min_open=True),
    default=None,
    help="Width of the Gaussian point-spread function in high-res pixels (--degradation gaussian).",
)

method_option = click.option(
    "--method",
    type=EnumChoice(Method),
    default=None,
    help="How fine detail is synthesized: 'sparse' (OMP over coupled K-SVD "
    "dictionaries) or 'anchored' (A+, faster). Default: the model's own method.",
)

degradation_option = click.option(
    "--degradation",
    type=EnumChoice(Degradation),
    default=None,
    help="How coarse data forms from fine data, used to make training pairs: "
    "'bicubic' (antialiased, default), 'gaussian' (point-spread function) or "
    "'area' (block mean).",
)

bands_option = click.option(
    "--bands",
    "-b",
    type=BandsType(),
    default=None,
    metavar="LIST",
    help="Band numbers to use, starting at 1, e.g. '1,2,4' or '1-3'. Default: all bands.",
)

guide_option = click.option(
    "--guide",
    "guides",
    multiple=True,
    metavar="FINE",
    help="A finer co-registered raster whose measured detail guides the magnification "
    "(a 10 m band beside 20 m bands, a panchromatic band); repeatable, the files are "
    "stacked. The scale is the ratio of the pixel sizes.",
)

guide_bands_option = click.option(
    "--guide-bands",
    type=BandsType(),
    default=None,
    metavar="LIST",
    help="Bands of the stacked --guide files to use, starting at 1, e.g. '1-4'. Default: all.",
)

chunk_option = click.option(
    "--chunk",
    type=IntAtLeast(MIN_CHUNK),
    default=1024,
    show_default=True,
    metavar="PIXELS",
    help="Side of the square input windows processed at a time; bounds memory.",
)

workers_option = click.option(
    "--workers",
    "-w",
    type=IntAtLeast(1),
    default=None,
    metavar="N",
    help="Start a local dask.distributed cluster of N worker processes.",
)

scheduler_option = click.option(
    "--scheduler",
    type=SchedulerAddress(),
    default=None,
    metavar="ADDRESS",
    help="Join a running dask.distributed scheduler, e.g. tcp://10.0.0.5:8786 "
    "(the rasters must be readable by the workers at the same paths); or run "
    "locally with 'threads' (default), 'processes' or 'synchronous'.",
)

quiet_option = click.option(
    "--quiet", "-q", is_flag=True, default=False, help="Print no progress."
)

overwrite_option = click.option(
    "--overwrite", is_flag=True, default=False, help="Replace an existing output."
)


spectral_guard_option = click.option(
    "--spectral-guard/--no-spectral-guard",
    "spectral_guard",
    default=True,
    show_default=True,
    help="With 2+ magnified bands, cap how far the per-band detail turns each pixel's "
    "spectrum (keeps SAM at or below bicubic's). Config key: spectral-guard.",
)


# ------------------------------------------------------------ config files


def config_schema(command):
    """The config keys of a click command, from its options.

    Returns
    -------
    dict
        ``{key: (param_name, kind, choices)}``, where ``key`` is the long
        option name without dashes (``"self-train"``), ``param_name`` the
        Python name (``"self_train"``), ``kind`` one of the kinds that
        :func:`geosr.cli.config.check_value` knows, ``choices`` a tuple or None.
    """
    schema = {}
    for param in command.params:
        if not isinstance(param, click.Option) or param.name in ("config", "help"):
            continue
        if getattr(param, "hidden", False):
            continue
        choices = None
        if param.is_flag:
            kind = "bool"
        elif isinstance(param.type, (_GeosrType, EnumChoice)):
            kind = param.type.config_kind
            if isinstance(param.type, EnumChoice):
                choices = tuple(param.type.choices)
        elif isinstance(param.type, click.types.IntParamType):
            kind = "int"
        elif isinstance(param.type, click.types.FloatParamType):
            kind = "number"
        else:
            kind = "str"
        if param.multiple and kind != "key-value":
            kind = "list-of-" + kind
        schema[option_key(param)] = Key(param.name, kind, choices)
    return schema


def _load_config_callback(ctx, param, value):
    if value is None:
        return None
    schema = config_schema(ctx.command)
    values = load_config(value, schema, command=ctx.info_name, sections=COMMANDS)
    defaults = dict(ctx.default_map or {})
    for key, val in values.items():
        defaults[schema[key].param] = val
    ctx.default_map = defaults
    ctx.meta[_CONFIG_META] = value
    ctx.meta["geosr.config_keys"] = {schema[k].param: k for k in values}
    return value


config_option = click.option(
    "--config",
    type=click.Path(exists=True, dir_okay=False),
    is_eager=True,
    expose_value=False,
    callback=_load_config_callback,
    metavar="FILE",
    help="Read option values from a TOML file (keys named as the options, e.g. "
    "chunk = 512); options given on the command line win.",
)


# ------------------------------------------------------- cross-option checks


def _is_set(value):
    return value is not None and value is not False and value != ()


def _option(ctx, name):
    return next(p for p in ctx.command.params if p.name == name)


def exclusive(ctx, first, second):
    """Resolve two mutually exclusive parameters of the current command.

    When both are set on the command line (or both in the config file) it is a
    usage error. When one comes from the command line and the other from the
    config file, the command line wins and the file's value is dropped.

    Returns
    -------
    tuple
        The two values, the losing one replaced by its "unset" value.
    """
    a, b = ctx.params.get(first), ctx.params.get(second)
    if not (_is_set(a) and _is_set(b)):
        return a, b
    src_a = ctx.get_parameter_source(first)
    src_b = ctx.get_parameter_source(second)
    explicit = (ParameterSource.COMMANDLINE, ParameterSource.ENVIRONMENT)
    unset_a = False if isinstance(a, bool) else None
    unset_b = False if isinstance(b, bool) else None
    if src_a in explicit and src_b not in explicit:
        return a, unset_b
    if src_b in explicit and src_a not in explicit:
        return unset_a, b
    key_a, key_b = option_key(_option(ctx, first)), option_key(_option(ctx, second))
    if src_a in explicit:
        names = f"--{key_a} and --{key_b} are"
    else:
        names = (
            f"The config keys {key_a!r} and {key_b!r} in {ctx.meta.get(_CONFIG_META)} are"
        )
    raise click.UsageError(
        f"{names} mutually exclusive; give only one, got {a!r} and {b!r}", ctx=ctx
    )


def workers_and_scheduler(ctx):
    """Resolve --workers and --scheduler: exclusive when the scheduler is a cluster.

    ``--workers N`` starts a local cluster and a scheduler address joins a
    running one, so the two are mutually exclusive; with a local scheduler
    name (``threads``, ``processes``) ``--workers`` is the pool size.
    """
    workers, scheduler = ctx.params.get("workers"), ctx.params.get("scheduler")
    if scheduler in LOCAL_SCHEDULERS:
        return workers, scheduler
    return exclusive(ctx, "workers", "scheduler")


# ------------------------------------------------------------------ output


def report(ctx, message):
    """Print a progress or summary line on stderr unless ``--quiet``."""
    if not ctx.params.get("quiet"):
        click.echo(message, err=True)
