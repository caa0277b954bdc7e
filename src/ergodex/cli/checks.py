"""Check settings on the command line: one option per :class:`~ergodex.validation.CheckSpec`
field, and ``--check-config FILE`` (a TOML file of the same keys).

Precedence: the base spec (defaults, or the spec recorded with a registered model for
``retrain``) < the ``--check-config`` file < options given on the command line. Every bad value
raises :class:`~ergodex.exceptions.SettingsError` naming the option or the file and key.

A check settings file::

    members = 32
    statistics = ["histogram", "autocorrelation", "occupancy"]
    min_pieces = 8
    regimes = "regimes.toml"        # a regimes file, relative to this file (or a [regimes] table)
    persistence = true              # with regimes, residence and transition rows too

    [tolerances]
    spectrum = 3.0
"""

from __future__ import annotations

import argparse
from pathlib import Path
from typing import Any

from ergodex.exceptions import SettingsError

#: CheckSpec field -> command-line option (the regimes option reads a file or asks for k-means).
OPTIONS: dict[str, str] = {
    "members": "--members",
    "length": "--length",
    "spinup": "--spinup",
    "seed": "--seed",
    "bins": "--bins",
    "max_lag": "--max-lag",
    "regimes": "--regimes",
    "tolerance": "--tolerance",
    "tolerances": "--tolerances",
    "statistics": "--statistics",
    "min_pieces": "--min-pieces",
    "gap": "--gap",
    "nperseg": "--nperseg",
    "max_blowup_fraction": "--max-blowup-fraction",
    "pool": "--pool",
    "false_reject_rate": "--false-reject-rate",
    "null_replicates": "--null-replicates",
    "threshold_floor": "--threshold-floor",
    "persistence": "--no-persistence",
}


def _bins(text: str) -> int | str:
    if text.strip().lower() == "fd":
        return "fd"
    try:
        return int(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"expected a bin count or 'fd', got {text!r}") from None


def _rate(text: str) -> float | str:
    if text.strip().lower() == "fixed":
        return "fixed"
    try:
        return float(text)
    except ValueError:
        raise argparse.ArgumentTypeError(
            f"expected a rate such as 0.05, or 'fixed', got {text!r}"
        ) from None


def _floor(text: str) -> float | str:
    if text.strip().lower() == "none":
        return "none"
    try:
        return float(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"expected a number or 'none', got {text!r}") from None


def _names(text: str) -> list[str]:
    return [part.strip() for part in text.split(",") if part.strip()]


def _tolerances(text: str) -> dict[str, float]:
    out: dict[str, float] = {}
    for part in _names(text):
        name, sep, value = part.partition("=")
        try:
            out[name.strip()] = float(value)
        except ValueError:
            sep = ""
        if not sep:
            raise argparse.ArgumentTypeError(
                f"expected STATISTIC=NUMBER[,STATISTIC=NUMBER...], got {part!r}"
            )
    return out


def add_check_options(
    parser: argparse.ArgumentParser, *, seed: bool = True, title: str = "check settings"
) -> None:
    """Add one option per check setting plus ``--check-config FILE``; all default to unset.

    ``seed=False`` leaves ``--seed`` to the command (``retrain`` seeds the whole decision).
    """
    from ergodex.check_names import (
        ALL_STATISTICS,
        DEFAULT_STATISTICS,
        DEFAULT_TOLERANCE,
    )

    group = parser.add_argument_group(
        title, "unset options keep the --check-config file's value, else the default"
    )
    group.add_argument(
        "--check-config",
        metavar="FILE",
        default=None,
        help="check settings (TOML, keys as the options below with '_' for '-')",
    )
    group.add_argument(
        "--members", type=int, default=None, metavar="N", help="ensemble members (default 16)"
    )
    group.add_argument(
        "--length",
        type=float,
        default=None,
        metavar="T",
        help="time per member after spin-up (default: the pooled reference pieces)",
    )
    group.add_argument(
        "--spinup",
        type=float,
        default=None,
        metavar="T",
        help="spin-up time discarded (default: 5 decorrelation times)",
    )
    if seed:
        group.add_argument(
            "--seed",
            type=int,
            default=None,
            metavar="S",
            help="seed of start states and noise (default 0)",
        )
    group.add_argument(
        "--bins", type=_bins, default=None, metavar="N|fd", help="histogram bins (default 35)"
    )
    group.add_argument(
        "--max-lag",
        type=float,
        default=None,
        metavar="T",
        help="longest autocorrelation lag (default: 3 decorrelation times or one dominant period)",
    )
    group.add_argument(
        "--regimes",
        metavar="FILE|kmeans:K[:SEED]",
        default=None,
        help="regimes for the occupancy, residence-time and transition rows: a regime file "
        "(TOML), or kmeans:K for K regimes learned by k-means on the reference data only "
        "(named kmeans0.., seed 0 unless :SEED); residence and transitions are scored too "
        "unless --no-persistence",
    )
    group.add_argument(
        "--no-persistence",
        dest="persistence",
        action="store_const",
        const=False,
        default=None,
        help="with regimes, score only the rows --statistics names (default: residence times "
        "and transitions too)",
    )
    group.add_argument(
        "--tolerance",
        type=float,
        default=None,
        metavar="X",
        help=f"largest allowed row ratio with --false-reject-rate fixed (default "
        f"{DEFAULT_TOLERANCE}); also the member-agreement tolerance",
    )
    group.add_argument(
        "--false-reject-rate",
        type=_rate,
        default=None,
        metavar="P|fixed",
        help="'fixed' (default): --tolerance for every row; P (e.g. 0.05): the threshold on the "
        "largest row ratio is the 1-P point of a right model's, from a bootstrap of the "
        "reference (slower: it replays the check)",
    )
    group.add_argument(
        "--null-replicates",
        type=int,
        default=None,
        metavar="N",
        help="bootstrap replicates behind that threshold (default 40)",
    )
    group.add_argument(
        "--threshold-floor",
        type=_floor,
        default=None,
        metavar="X|none",
        help=f"smallest threshold the bootstrap may give (default {DEFAULT_TOLERANCE})",
    )
    group.add_argument(
        "--tolerances",
        type=_tolerances,
        default=None,
        metavar="STAT=X[,STAT=X]",
        help="per-statistic tolerances",
    )
    group.add_argument(
        "--statistics",
        type=_names,
        default=None,
        metavar="A,B,...",
        help=f"rows to compute, from {', '.join(ALL_STATISTICS)} "
        f"(default {','.join(DEFAULT_STATISTICS)})",
    )
    group.add_argument(
        "--min-pieces",
        type=int,
        default=None,
        metavar="N",
        help="fewest reference pieces for a noise floor (default 8)",
    )
    group.add_argument(
        "--gap",
        type=float,
        default=None,
        metavar="T",
        help="time left out between blocks of one run (default: 5 decorrelation times)",
    )
    group.add_argument(
        "--nperseg",
        type=int,
        default=None,
        metavar="N",
        help="Welch segment length in samples (default: min(256, piece/8), raised to cover "
        "4 dominant periods up to piece/8)",
    )
    group.add_argument(
        "--max-blowup-fraction",
        type=float,
        default=None,
        metavar="F",
        help="share of members allowed to blow up (default 0)",
    )
    group.add_argument(
        "--pool",
        type=int,
        default=None,
        metavar="N",
        help="reference pieces pooled into one compared sample (default: half)",
    )


def read_check_config(path: str | Path) -> dict[str, Any]:
    """Read a check settings TOML file into CheckSpec keys (``regimes`` read as a table)."""
    import tomllib

    from ergodex.regimes import RegimeSet
    from ergodex.validation import CheckSpec

    path = Path(path)
    try:
        with path.open("rb") as handle:
            document = tomllib.load(handle)
    except FileNotFoundError:
        raise SettingsError(f"{path}: check settings file not found") from None
    except tomllib.TOMLDecodeError as exc:
        raise SettingsError(f"{path}: not valid TOML: {exc}") from None
    except OSError as exc:
        raise SettingsError(f"{path}: cannot read check settings: {exc.strerror}") from None
    known = list(CheckSpec.__dataclass_fields__)
    for key in document:
        if key not in known:
            raise SettingsError(f"{path}: unknown check setting {key!r}; known: {', '.join(known)}")
    regimes = document.get("regimes")
    if isinstance(regimes, str):
        regimes_path = Path(regimes)
        if not regimes_path.is_absolute():
            regimes_path = path.parent / regimes_path
        document["regimes"] = RegimeSet.from_toml(regimes_path).to_dict()
    elif regimes is not None:
        document["regimes"] = RegimeSet.from_dict(regimes, source=f"{path}: regimes").to_dict()
    return document


def regimes_option(text: str):
    """The RegimeSet ``--regimes`` names: ``kmeans:K[:SEED]`` (K k-means regimes, fitted on the
    reference when the check runs), else a regime file."""
    from ergodex.regimes import RegimeSet

    if not text.startswith("kmeans:"):
        return RegimeSet.from_toml(text)
    parts = text.split(":")[1:]
    try:
        if len(parts) not in (1, 2):
            raise ValueError
        clusters, seed = int(parts[0]), int(parts[1]) if len(parts) == 2 else 0
    except ValueError:
        raise SettingsError(
            f"--regimes: expected kmeans:K or kmeans:K:SEED with whole numbers; got {text!r}"
        ) from None
    entry = {"name": "kmeans", "kind": "kmeans", "clusters": clusters, "seed": seed}
    return RegimeSet.from_dict({"regime": [entry]}, source=f"--regimes {text}")


def check_overrides(args: argparse.Namespace) -> tuple[dict[str, Any], dict[str, str]]:
    """The check settings the command line asks for, and where each came from.

    Returns ``(settings, origin)``: CheckSpec keys with JSON-shaped values (regimes as a
    table), and for each key the option or file that set it (for error messages).
    """

    settings: dict[str, Any] = {}
    origin: dict[str, str] = {}
    config = getattr(args, "check_config", None)
    if config is not None:
        for key, value in read_check_config(config).items():
            settings[key], origin[key] = value, str(config)
    for key, option in OPTIONS.items():
        value = getattr(args, key, None)
        if value is None:
            continue
        if key == "regimes":
            value = regimes_option(value).to_dict()
        settings[key], origin[key] = value, option
    return settings, origin


def build_spec(args: argparse.Namespace, base: Any = None):
    """A checked :class:`CheckSpec`: ``base`` (default: CheckSpec()) with the command line's
    settings on top; a bad value raises SettingsError naming its option or file."""
    from ergodex.validation import CheckSpec

    settings, origin = check_overrides(args)
    merged = (base if base is not None else CheckSpec()).to_dict()
    merged.update(settings)
    try:
        return CheckSpec.from_dict(merged)
    except SettingsError as exc:
        raise SettingsError(_name_origin(str(exc), origin)) from None
    except TypeError as exc:  # a value of the wrong kind that the dataclass refused
        raise SettingsError(f"check settings: {exc}") from None


def _name_origin(message: str, origin: dict[str, str]) -> str:
    """Prefix a CheckSpec message with the option or file that set the setting it names."""
    token, _, rest = message.partition(" ")
    key = token.rstrip(":")
    where = origin.get(key.split(".", 1)[0])
    if where is None:
        return f"check settings: {message}"
    if where.startswith("--") and key in origin:
        return f"{where}{':' if token.endswith(':') else ''} {rest}"
    return f"{where}: {message}"
