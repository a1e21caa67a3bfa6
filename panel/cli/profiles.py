"""Model profiles: named model set-ups in a TOML file that a team shares.

The file is ``riskprem.toml`` in the working folder, or the one ``--config PATH`` (env
``RISKPREM_CONFIG``) names.  Each table ``[profiles.NAME]`` holds model options under their option
names with ``_`` (the units of the command line: volatilities in % a year; premium volatility V
means the annualised premium moves V points over a year, :mod:`panel.units`)::

    [profiles.committee]
    premium_factors = 1
    premium_prior = "1.5:120"          # VOL:WEIGHT
    fix = ["own_premium_vol=1"]        # or a table: fix = { own_premium_vol = 1 }
    vol_scale = "ewma:6"

``--profile NAME`` loads one; options given on the command line win over it (``--fix`` entries
per name).  Every key is checked when the profile is read: an unknown key or a bad value stops
the command with one line naming the file, the profile and the key (exit 1), before anything is
read or written.
"""

from __future__ import annotations

from pathlib import Path

#: The profile file looked for in the working folder when ``--config`` is not given.
DEFAULT_FILE = "riskprem.toml"

class ProfileError(ValueError):
    """A profile file, profile or key that cannot be used (one line: file, profile, key, fix)."""


def profile_path(config: Path | None) -> Path:
    return Path(config) if config is not None else Path.cwd() / DEFAULT_FILE


def _read(path: Path) -> dict:
    import tomllib

    if not path.is_file():
        raise ProfileError(f"no profile file {path}; write one with [profiles.NAME] tables of model "
                           "options, or give --config PATH")
    try:
        with path.open("rb") as handle:
            return tomllib.load(handle)
    except tomllib.TOMLDecodeError as error:
        raise ProfileError(f"{path}: not valid TOML ({error}); fix the file") from None


def _value(key: str, value, where: str, kind):
    """``value`` of ``key`` checked for its type and converted to what the option takes."""
    from enum import Enum

    if kind is bool and not isinstance(value, bool):
        raise ProfileError(f"{where}: {value!r} is not true or false")
    if kind is int and (isinstance(value, bool) or not isinstance(value, int)):
        raise ProfileError(f"{where}: {value!r} is not a whole number")
    if kind is float and (isinstance(value, bool) or not isinstance(value, (int, float))):
        raise ProfileError(f"{where}: {value!r} is not a number")
    if kind is str:
        if isinstance(value, bool) or not isinstance(value, (str, int, float)):
            raise ProfileError(f"{where}: {value!r} is not text such as \"1.5:120\"")
        return str(value)
    if isinstance(kind, type) and issubclass(kind, Enum):
        try:
            return kind(str(value))
        except ValueError:
            raise ProfileError(f"{where}: {value!r} is not one of "
                               f"{', '.join(c.value for c in kind)}") from None
    if kind is list:
        if isinstance(value, dict):
            value = [f"{name}={v}" for name, v in value.items()]
        if isinstance(value, str):
            value = [value]
        if not isinstance(value, list) or not all(isinstance(v, str) for v in value):
            raise ProfileError(f"{where}: give a list such as [\"own_premium_vol=1\"] or a table "
                               "such as { own_premium_vol = 1 }")
        return tuple(value)
    return value


def load_profile(name: str, config: Path | None, kinds: dict, check) -> dict:
    """The model options of profile ``name`` (option name -> typed value) from ``config`` or
    ``./riskprem.toml``; raises :class:`ProfileError`.

    ``kinds``: option name -> the type its value takes (int, float, str, an Enum or list);
    ``check(name, value)`` raises ``ValueError`` with the reason when a value cannot be used.
    (Both come from :mod:`panel.cli.model_options`, where the options are defined.)
    """
    path = profile_path(config)
    document = _read(path)
    extra = sorted(set(document) - {"profiles"})
    if extra:
        raise ProfileError(f"{path}: unknown table or key {extra[0]!r}; profiles go in "
                           "[profiles.NAME] tables")
    profiles = document.get("profiles", {})
    if not isinstance(profiles, dict) or name not in profiles or not isinstance(profiles[name], dict):
        known = ", ".join(sorted(p for p in profiles if isinstance(profiles.get(p), dict))) or "none"
        raise ProfileError(f"{path}: no profile {name!r} (profiles: {known}); add [profiles.{name}] "
                           "or pick another")
    found = {}
    for key, value in profiles[name].items():
        where = f"{path}: profile {name!r}, key {key!r}"
        if key not in kinds:
            raise ProfileError(f"{where}: not a model option; use one of {', '.join(kinds)}")
        found[key] = _value(key, value, where, kinds[key])
        try:
            check(key, found[key])
        except ValueError as error:
            raise ProfileError(f"{where}: {error}") from None
    return found
