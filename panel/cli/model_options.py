"""The model options, defined once for every command that takes them (fit, backfill, revisions, evaluate).

A command declares one parameter ``model: ModelOptions`` and is decorated with
:func:`with_model_options`; the decorator adds the options below to the command's signature (so
typer shows them in ``--help``) and hands the command one :class:`ModelOptions` value.  Volatilities
are annualised percent on the command line and become the spec's annualised decimals here.
"""

from __future__ import annotations

import dataclasses
import functools
import inspect
import typing
from enum import Enum
from typing import Annotated

import typer

from panel.cli.common import parse_assignments, parse_number, parse_pair


class Shocks(str, Enum):
    diagonal = "diagonal"
    factor = "factor"
    full = "full"


class StdErrors(str, Enum):
    auto = "auto"
    always = "always"
    never = "never"


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
    ("std_errors", Annotated[StdErrors | None, typer.Option(
        "--std-errors", help="Parameter standard errors (auto: when the free parameters number at most "
                             "150). Default auto.", show_default=False)], None),
)
DEFAULTS = {name: default for name, _, default in OPTIONS}


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
    std_errors: StdErrors | None = None

    def given(self) -> bool:
        """Whether any option differs from its default (the user described a model)."""
        return any(getattr(self, name) not in (default, None, [], ()) for name, default in DEFAULTS.items()
                   if name != "fix") or bool(self.fix)

    def spec(self):
        """The :class:`~panel.model.spec.ModelSpec` these options describe (syntax errors exit 2)."""
        from panel.model.spec import InitialPremium, ModelSpec, Prior, VolScale

        fixed = {name: parse_number(value, "--fix", name) / 100.0
                 for name, value in parse_assignments(self.fix, "--fix").items()}
        scale = None
        text = (self.vol_scale or "none").strip().lower()
        if text != "none":
            kind, sep, half = text.partition(":")
            if kind != "ewma" or not sep:
                raise typer.BadParameter(f"{self.vol_scale!r} is not 'none' or 'ewma:HALFLIFE'",
                                         param_hint="--vol-scale")
            scale = VolScale("ewma", half_life=parse_number(half, "--vol-scale", "half-life"))
        prior = None
        if self.premium_prior is not None:
            vol, weight = parse_pair(self.premium_prior, "--premium-prior", "vol", "weight")
            prior = Prior(vol=vol / 100.0, weight=weight)
        start = None
        if self.initial_premium is not None:
            mean, vol = parse_pair(self.initial_premium, "--initial-premium", "mean", "vol")
            start = InitialPremium(mean=mean / 100.0, vol=vol / 100.0)
        extra = {} if self.max_iter is None else {"max_iter": self.max_iter}
        if self.std_errors is not None:
            extra["std_errors"] = self.std_errors.value
        if self.time_budget is not None:
            extra["time_budget"] = self.time_budget   # a non-finite one is refused in one line later
        return ModelSpec(premium_factors=self.premium_factors,
                         return_shocks=None if self.return_shocks is None else self.return_shocks.value,
                         return_factors=self.return_factors, vol_scale=scale, fixed=fixed,
                         max_premium_vol=None if self.max_premium_vol is None else self.max_premium_vol / 100.0,
                         premium_prior=prior, initial_premium=start, starts=self.starts, **extra)


def with_model_options(command):
    """Add the model options to ``command``'s signature; it receives them as ``model: ModelOptions``."""
    signature = inspect.signature(command)
    hints = typing.get_type_hints(command, include_extras=True)  # the command's string annotations
    params = [p.replace(annotation=hints.get(p.name, p.annotation))
              for p in signature.parameters.values() if p.name != "model"]
    cut = next((i for i, p in enumerate(params) if p.name in ("as_json", "as_csv")), len(params))
    added = [inspect.Parameter(name, inspect.Parameter.KEYWORD_ONLY, default=default, annotation=annotation)
             for name, annotation, default in OPTIONS]
    params = [p.replace(kind=inspect.Parameter.KEYWORD_ONLY) if i >= cut else p for i, p in enumerate(params)]
    params = params[:cut] + added + params[cut:]

    @functools.wraps(command)
    def wrapper(*args, **kwargs):
        values = {name: kwargs.pop(name, DEFAULTS[name]) for name in DEFAULTS}
        values["fix"] = tuple(values["fix"] or ())
        return command(*args, model=ModelOptions(**values), **kwargs)

    wrapper.__signature__ = signature.replace(parameters=params)
    wrapper.__annotations__ = {p.name: p.annotation for p in params}
    return wrapper

