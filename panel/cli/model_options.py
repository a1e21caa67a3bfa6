"""The model options, defined once for every command that takes them (fit, backfill, revisions, evaluate).

A command declares one parameter ``model: ModelOptions`` and is decorated with
:func:`with_model_options`; the decorator adds the options below to the command's signature (so
typer shows them in ``--help``), plus ``--profile NAME`` and ``--config PATH`` (named set-ups,
:mod:`panel.cli.profiles`), and hands the command one :class:`ModelOptions` value.  Options typed on
the command line win over the profile's.  Volatilities are annualised percent on the command line
and become the spec's annualised decimals here.
"""

from __future__ import annotations

import dataclasses
import functools
import inspect
import typing
from enum import Enum
from pathlib import Path
from typing import Annotated

import typer

from panel.cli.common import fail, parse_assignments, parse_number, parse_pair


class Shocks(str, Enum):
    diagonal = "diagonal"
    factor = "factor"
    full = "full"


class StdErrors(str, Enum):
    auto = "auto"
    always = "always"
    never = "never"


class Gaps(str, Enum):
    direct = "direct"
    filled = "filled"
    auto = "auto"


_PREMIUM_VOL = "premium volatility V% a year: the annualised premium moves V points (1 sd) over a year"

#: (name, annotation, default) of each model option, in help order.
OPTIONS = (
    ("premium_factors", Annotated[int | None, typer.Option(
        "--premium-factors", help="Common premium factors k (0 = independent local levels); default 1 "
                                  "with 3+ assets.", show_default=False)], None),
    ("return_shocks", Annotated[Shocks | None, typer.Option(
        "--return-shocks", help="Structure of the return-shock covariance; default factor.",
        show_default=False)], None),
    ("return_factors", Annotated[int, typer.Option(
        "--return-factors", help="Return factors r for --return-shocks factor.")], 1),
    ("vol_scale", Annotated[str, typer.Option(
        "--vol-scale", metavar="none|ewma:HALFLIFE",
        help="Ex-ante volatility scale of the return shocks: an EWMA of past squared returns with this "
             "half-life in periods.")], "none"),
    ("fix", Annotated[list[str] | None, typer.Option(
        "--fix", metavar="NAME=VALUE",
        help="Hold a volatility fixed, % a year: own_premium_vol=1 (each asset's OWN premium part, "
             f"the local level; {_PREMIUM_VOL}; 0 = constant apart from common factors), "
             "return_vol=15 (own return-shock vol, sqrt(h x periods a year)), or per asset "
             "own_premium_vol:ASSET=0.5. premium_vol means own_premium_vol. Repeatable.",
        show_default=False)], None),
    ("max_premium_vol", Annotated[float | None, typer.Option(
        "--max-premium-vol", metavar="PCT",
        help=f"Upper bound on each asset's TOTAL (common + own) {_PREMIUM_VOL}.",
        show_default=False)], None),
    ("premium_prior", Annotated[str | None, typer.Option(
        "--premium-prior", metavar="VOL:WEIGHT",
        help=f"Prior on the premium innovations: {_PREMIUM_VOL}, worth WEIGHT pseudo-periods, "
             "e.g. 1:120.", show_default=False)], None),
    ("initial_premium", Annotated[str | None, typer.Option(
        "--initial-premium", metavar="MEAN:VOL",
        help="Prior for each premium at its first observation, annualised %, e.g. 4:10 "
             "(default: diffuse).", show_default=False)], None),
    ("starts", Annotated[int, typer.Option(
        "--starts", min=1, metavar="N",
        help="Also fit from N-1 deterministic perturbed starts and keep the best (guards against a "
             "local optimum; costs N fits).")], 1),
    ("max_iter", Annotated[int | None, typer.Option(
        "--max-iter", min=1, help="Most EM iterations (E-steps) per fit (default 5000).",
        show_default=False)], None),
    ("time_budget", Annotated[float | None, typer.Option(
        "--time-budget", metavar="SECONDS", help="Stop an estimation after this long (status "
                                                 "time_budget).", show_default=False)], None),
    ("gaps", Annotated[Gaps | None, typer.Option(
        "--gaps", help="How a panel with gaps (returns missing inside an asset's history) is fitted: "
                       "direct (default) on the panel itself; filled mostly on a copy with the gaps "
                       "filled by their conditional means, corrected by exact E-steps (30-40x faster "
                       "on wide panels; where the likelihood has several local optima it can end in "
                       "another one); auto: filled where it pays.", show_default=False)], None),
    ("std_errors", Annotated[StdErrors | None, typer.Option(
        "--std-errors", help="Parameter standard errors (auto: when the free parameters number at most "
                             "150). Default auto.", show_default=False)], None),
    ("bayes", Annotated[bool, typer.Option(
        "--bayes", help="Bayesian estimation: sample the posterior by Gibbs, so bands carry parameter "
                        "uncertainty (slower; see --draws, --chains, --seed, --prior).")], False),
    ("draws", Annotated[int | None, typer.Option(
        "--draws", min=1, metavar="N", help="With --bayes: kept draws per chain (default 1000).",
        show_default=False)], None),
    ("chains", Annotated[int | None, typer.Option(
        "--chains", min=1, metavar="C", help="With --bayes: chains, for the mixing check (default 4).",
        show_default=False)], None),
    ("warmup", Annotated[int | None, typer.Option(
        "--warmup", min=0, metavar="N", help="With --bayes: discarded sweeps per chain (default: as "
                                             "many as --draws).", show_default=False)], None),
    ("seed", Annotated[int | None, typer.Option(
        "--seed", min=0, metavar="S", help="With --bayes: root seed (default 0); each cut-off draws "
                                           "its own stream from it, so runs reproduce exactly.",
        show_default=False)], None),
    ("summary_draws", Annotated[int | None, typer.Option(
        "--summary-draws", min=1, metavar="M", help="With --bayes: parameter draws the premium "
        "summaries (bands, probabilities) mix over, and the run stores (default 100).",
        show_default=False)], None),
    ("prior", Annotated[list[str] | None, typer.Option(
        "--prior", metavar="NAME=VALUE",
        help="With --bayes: a prior, volatilities in % a year: premium_vol=2 (scale of each OWN "
             f"premium volatility; {_PREMIUM_VOL}), loading_vol=2, return_vol=15, "
             "return_loading_vol=15, premium_vol_family=invgamma, premium_vol_shape=2, "
             "return_vol_shape=2. Repeatable.", show_default=False)], None),
)
#: The options that only Bayesian estimation takes (a profile may set them with bayes = true).
BAYES_OPTIONS = ("draws", "chains", "warmup", "seed", "summary_draws", "prior")
#: Mergeable NAME=VALUE options: a profile's entries and the typed ones merge by name.
ASSIGNMENTS = {"fix": "--fix", "prior": "--prior"}
DEFAULTS = {name: default for name, _, default in OPTIONS}
#: The profile options the decorator adds before the model options.
PROFILE_OPTIONS = (
    ("profile", Annotated[str | None, typer.Option(
        "--profile", metavar="NAME",
        help="Model options from profile NAME of riskprem.toml (or --config); options given here win "
             "(--fix per name).", show_default=False)], None),
    ("config", Annotated[Path | None, typer.Option(
        "--config", metavar="PATH", envvar="RISKPREM_CONFIG",
        help="The profile file (default ./riskprem.toml).", show_default=False)], None),
)


@dataclasses.dataclass(frozen=True)
class ModelOptions:
    """The model options as typed on the command line (percent units, unparsed pairs)."""

    premium_factors: int | None = None
    return_shocks: Shocks | None = None
    return_factors: int = 1
    vol_scale: str = "none"
    fix: tuple[str, ...] = ()
    max_premium_vol: float | None = None
    premium_prior: str | None = None
    initial_premium: str | None = None
    starts: int = 1
    max_iter: int | None = None
    time_budget: float | None = None
    gaps: Gaps | None = None
    std_errors: StdErrors | None = None
    bayes: bool = False
    draws: int | None = None
    chains: int | None = None
    warmup: int | None = None
    seed: int | None = None
    summary_draws: int | None = None
    prior: tuple[str, ...] = ()
    #: The profile's name and its values ((option, value) pairs), if one was asked for.
    profile: str | None = None
    profile_values: tuple = ()
    #: Options typed on the command line (None: every field as set here, e.g. from Python).
    explicit: frozenset | None = None

    def effective(self) -> dict:
        """Option name -> value after merging: typed options win over the profile's values, which
        win over the defaults; ``fix`` and ``prior`` entries merge by name."""
        values = {name: getattr(self, name) for name in DEFAULTS}
        typed = set(DEFAULTS) if self.explicit is None else set(self.explicit)
        for name, value in self.profile_values:
            if name in ASSIGNMENTS:
                flag = ASSIGNMENTS[name]
                mine = parse_assignments(getattr(self, name), flag) if name in typed else {}
                merged = {**parse_assignments(value, flag), **mine}
                values[name] = tuple(f"{key}={item}" for key, item in merged.items())
            elif name not in typed:
                values[name] = value
        return values

    def given(self) -> bool:
        """Whether any option differs from its default (the user described a model)."""
        values = self.effective()
        return any(values[name] not in (default, None, [], ()) for name, default in DEFAULTS.items()
                   if name not in ASSIGNMENTS) or any(bool(values[name]) for name in ASSIGNMENTS)

    def spec(self):
        """The :class:`~panel.model.spec.ModelSpec` these options describe, profile merged in
        (syntax errors exit 2)."""
        from panel.model.spec import InitialPremium, ModelSpec, Prior, VolScale

        v = self.effective()
        fixed = {name: parse_number(value, "--fix", name) / 100.0
                 for name, value in parse_assignments(v["fix"], "--fix").items()}
        scale = None
        text = (v["vol_scale"] or "none").strip().lower()
        if text != "none":
            kind, sep, half = text.partition(":")
            if kind != "ewma" or not sep:
                raise typer.BadParameter(f"{v['vol_scale']!r} is not 'none' or 'ewma:HALFLIFE'",
                                         param_hint="--vol-scale")
            scale = VolScale("ewma", half_life=parse_number(half, "--vol-scale", "half-life"))
        prior = None
        if v["premium_prior"] is not None:
            vol, weight = parse_pair(v["premium_prior"], "--premium-prior", "vol", "weight")
            prior = Prior(vol=vol / 100.0, weight=weight)
        start = None
        if v["initial_premium"] is not None:
            mean, vol = parse_pair(v["initial_premium"], "--initial-premium", "mean", "vol")
            start = InitialPremium(mean=mean / 100.0, vol=vol / 100.0)
        extra = {} if v["max_iter"] is None else {"max_iter": v["max_iter"]}
        if v["std_errors"] is not None:
            extra["std_errors"] = v["std_errors"].value
        if v["gaps"] is not None:
            extra["finish"] = v["gaps"].value
        if v["time_budget"] is not None:
            extra["time_budget"] = v["time_budget"]   # a non-finite one is refused in one line later
        if v["bayes"]:
            extra["estimation"] = "bayes"
        for name in ("draws", "chains", "warmup", "seed", "summary_draws"):
            if v[name] is not None:
                extra[name] = v[name]
        if v["prior"]:
            extra["priors"] = _priors(v["prior"])
        cap = v["max_premium_vol"]
        return ModelSpec(premium_factors=v["premium_factors"],
                         return_shocks=None if v["return_shocks"] is None else v["return_shocks"].value,
                         return_factors=v["return_factors"], vol_scale=scale, fixed=fixed,
                         max_premium_vol=None if cap is None else cap / 100.0,
                         premium_prior=prior, initial_premium=start, starts=v["starts"], **extra)


def _priors(items) -> dict:
    """``--prior NAME=VALUE`` items -> the dict of :class:`panel.bayes.Priors` (volatilities from
    percent to decimals), checked (a bad name or value exits 2)."""
    from panel.bayes.priors import PriorError, Priors

    out = {}
    for name, value in parse_assignments(items, "--prior").items():
        if name == "premium_vol_family":
            out[name] = value
        else:
            number = parse_number(value, "--prior", name)
            out[name] = number / 100.0 if name.endswith("_vol") else number
    try:
        return Priors.from_dict(out).to_dict()
    except (PriorError, TypeError) as error:
        raise typer.BadParameter(str(error).splitlines()[0], param_hint="--prior") from None


def _typed(ctx, name: str) -> bool:
    """Whether option ``name`` was given on the command line or by its environment variable
    (typer passes defaults for the others, so the value alone cannot tell)."""
    source = ctx.get_parameter_source(name) if ctx is not None else None
    return source is not None and source.name not in ("DEFAULT", "DEFAULT_MAP")


def option_types() -> dict:
    """Option name -> the type its value takes (int, float, str, an Enum or list), from :data:`OPTIONS`."""
    found = {}
    for name, annotation, _ in OPTIONS:
        base = typing.get_args(annotation)[0]                    # Annotated[X, Option(...)] -> X
        kinds = [t for t in (typing.get_args(base) or (base,)) if t is not type(None)]
        found[name] = typing.get_origin(kinds[0]) or kinds[0]    # list[str] -> list
    return found


def check_option(name: str, value) -> None:
    """Raise ``ValueError`` (the reason) when option ``name`` cannot take ``value``: the spec it
    describes is built and resolved on a nominal 12-asset monthly panel, so a profile's bad value
    is named when the profile is read, not halfway through a command."""
    from panel.model.spec import SpecError

    try:
        bayes = {"bayes": True} if name in BAYES_OPTIONS else {}   # checked as they would be used
        spec = ModelOptions(**{name: value, **bayes}).spec()
        assets = tuple(f"a{i}" for i in range(12))
        if all(":" not in key for key, _ in spec.fixed):       # per-asset fixes need the data
            spec.resolve(len(assets), 12, 240, assets)
    except typer.BadParameter as error:
        raise ValueError(error.message) from None
    except SpecError as error:
        raise ValueError(str(error)) from None


def _options_from(kwargs: dict) -> ModelOptions:
    """Pop the model and profile options out of a command's ``kwargs``; load the profile."""
    from panel.cli.profiles import ProfileError, load_profile

    values = {name: kwargs.pop(name, DEFAULTS[name]) for name in DEFAULTS}
    for name in ASSIGNMENTS:
        values[name] = tuple(values[name] or ())
    profile, config = kwargs.pop("profile", None), kwargs.pop("config", None)
    ctx = kwargs.get("ctx")
    explicit = frozenset(name for name in DEFAULTS if _typed(ctx, name)) if ctx is not None else None
    if profile is None:
        if config is not None and _typed(ctx, "config") and ctx.get_parameter_source("config").name != "ENVIRONMENT":
            raise typer.BadParameter("--config names the profile file; give --profile NAME too",
                                     param_hint="--config")
        return ModelOptions(**values, explicit=explicit)
    try:
        found = load_profile(profile, config, option_types(), check_option)
    except ProfileError as error:
        fail(str(error))
    return ModelOptions(**values, profile=profile, profile_values=tuple(found.items()), explicit=explicit)


def with_model_options(command):
    """Add the model options to ``command``'s signature; it receives them as ``model: ModelOptions``."""
    signature = inspect.signature(command)
    hints = typing.get_type_hints(command, include_extras=True)  # the command's string annotations
    params = [p.replace(annotation=hints.get(p.name, p.annotation))
              for p in signature.parameters.values() if p.name != "model"]
    cut = next((i for i, p in enumerate(params) if p.name in ("as_json", "as_csv")), len(params))
    added = [inspect.Parameter(name, inspect.Parameter.KEYWORD_ONLY, default=default, annotation=annotation)
             for name, annotation, default in (*PROFILE_OPTIONS, *OPTIONS)]
    params = [p.replace(kind=inspect.Parameter.KEYWORD_ONLY) if i >= cut else p for i, p in enumerate(params)]
    params = params[:cut] + added + params[cut:]

    @functools.wraps(command)
    def wrapper(*args, **kwargs):
        return command(*args, model=_options_from(kwargs), **kwargs)

    wrapper.__signature__ = signature.replace(parameters=params)
    wrapper.__annotations__ = {p.name: p.annotation for p in params}
    return wrapper

