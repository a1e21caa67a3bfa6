"""Model specification: what to fit, fixed once and stored with every run.

Notation (used everywhere in riskprem)::

    y_t  = mu_t + eps_t,          eps_t ~ N(0, H_t),  H_t = s_t^2 H     (return shocks)
    mu_t = mu_{t-1} + w_t,        w_t   ~ N(0, Sigma)                    (premia, local levels)
    Sigma = Lambda Lambda' + diag(q)                                     (k common premium factors)
    H     = diag(psi) | B B' + diag(psi) | full                          (return-shock structure)

``y_t`` are excess returns in decimal per period.  User-facing volatilities in a spec are
**annualised decimals** in the conventions of :mod:`panel.units`: a return volatility of 0.20 is a
per-period variance ``h = 0.20^2 / ppy``; a premium volatility of 0.01 means the annualised premium
moves by 1 point (1 sd) over a year, a per-period innovation variance ``q = 0.01^2 / ppy^3``
(``premium_vol_convention``; runs stored before it existed used ``q = V^2 / ppy``).  Internally
everything is per period.
"""

from __future__ import annotations

import math
from dataclasses import asdict, dataclass, field, fields

from panel import units

RETURN_SHOCKS = ("diagonal", "factor", "full")
ESTIMATIONS = ("ml", "bayes")
#: Stopping rules of the active-set finish (see ``ModelSpec.stopping``).
STOPPING_RULES = ("gain-model", "gradient")
#: Where the quasi-Newton finish works (see ``ModelSpec.finish``).
FINISHES = ("direct", "filled", "auto")
#: How a premium-volatility cap with one premium factor is kept (see ``ModelSpec.cap_method``).
CAP_METHODS = ("box", "projection")
#: How the score is formed (see ``ModelSpec.score_form``).
SCORE_FORMS = ("disturbance", "moments")
#: The Bayesian settings (``estimation="bayes"``) and their defaults; an ML spec leaves them out of
#: :meth:`ModelSpec.to_dict`, so ML settings read and store exactly as before they existed.
BAYES_DEFAULTS = {"draws": 1000, "chains": 4, "seed": 0, "warmup": None, "priors": None,
                  "summary_draws": 100, "augment_gaps": True}
FIXABLE = ("own_premium_vol", "return_vol")
#: Accepted spellings of fixable names (normalised to the first form when the spec is built).
FIX_ALIASES = {"premium_vol": "own_premium_vol"}


class SpecError(ValueError):
    """A model specification that cannot be fitted; the message is one line naming the fix."""


def _freeze_priors(priors, bayes: bool):
    """Priors (a :class:`panel.bayes.priors.Priors`, a mapping, or None: the defaults) as the full
    sorted (name, value) pairs of a Bayesian spec, so the spec stays immutable and hashable and the
    stored settings name every prior; None for an ML spec without priors."""
    if priors is None and not bayes:
        return None
    from panel.bayes.priors import PriorError, Priors   # scipy: only for Bayesian specs

    if priors is None:
        priors = Priors()
    if not isinstance(priors, Priors):
        if not isinstance(priors, (dict, tuple, list)):
            raise SpecError(f"priors must be a panel.bayes.Priors or a dict, not {type(priors).__name__}")
        try:
            priors = Priors.from_dict(dict(priors))
        except (PriorError, TypeError) as error:
            raise SpecError(str(error).splitlines()[0]) from None
    return tuple(sorted(priors.to_dict().items()))


@dataclass(frozen=True)
class Prior:
    """Weakly-informative inverse-Wishart prior on a covariance, as pseudo-observations.

    ``weight`` pseudo-periods whose covariance is ``v * I``: the M-step target becomes
    ``(n S + weight v I) / (n + weight)``.  ``vol`` is annualised, decimal, in the convention of
    what it is a prior on: ``v = units.premium_variance(vol, ppy)`` for the premium innovations
    (0.01: the premium moves about a point a year), ``v = vol^2 / ppy`` for return shocks.
    """

    vol: float
    weight: float


@dataclass(frozen=True)
class InitialPremium:
    """Informative prior for each asset's premium at its first observation (instead of diffuse).

    ``mean`` and ``vol`` are annualised decimals (mean 0.05 = 5% a year).
    """

    mean: float
    vol: float


@dataclass(frozen=True)
class VolScale:
    """Ex-ante volatility scale ``s_t`` (``H_t = s_t^2 H``).

    ``kind="ewma"``: ``s_t^2`` is the exponentially weighted mean (half-life ``half_life`` periods)
    of the cross-sectional mean squared return over dates before t, divided by the expanding mean of
    the same quantity before t (past data only, so a vintage never uses its future).
    ``kind="series"``: ``values`` is a user series of ``s_t`` (one positive value per date).
    """

    kind: str
    half_life: float | None = None
    values: tuple[float, ...] | None = None


def _freeze(mapping) -> tuple[tuple[str, float], ...]:
    out = {}
    for key, value in dict(mapping or {}).items():
        name, sep, asset = str(key).partition(":")
        canonical = FIX_ALIASES.get(name, name) + sep + asset
        if canonical in out:
            raise SpecError(f"fixed {canonical!r} is given twice (as {key!r} too); give it once")
        out[canonical] = float(value)
    return tuple(sorted(out.items()))


@dataclass(frozen=True)
class ModelSpec:
    """Settings of a fit.  The constructor only stores them; :meth:`resolve` validates against data.

    Parameters
    ----------
    premium_factors : int or None
        ``k`` common premium factors, 0..5; None -> 1 when N >= 3, else 0.
    return_shocks : {"diagonal", "factor", "full"} or None
        Structure of ``H``; None -> "factor" when identifiable with ``return_factors``, else
        "full" for N = 2, "diagonal" for N = 1.
    return_factors : int
        ``r`` for ``return_shocks="factor"``.
    periods_per_year : int or None
        None -> the panel's.
    vol_scale : VolScale or None
    fixed : mapping
        Parameters held fixed, annualised decimal volatilities: ``own_premium_vol`` (every asset's
        OWN premium volatility, the local level ``a_t``'s part ``q_i``; with k = 0 that is the whole
        premium; 0 makes it constant apart from the common factors) or ``own_premium_vol:ASSET``
        (``premium_vol`` is accepted for ``own_premium_vol``); ``return_vol`` (the own return-shock
        volatility sqrt(psi_i ppy); diagonal or factor H) or ``return_vol:ASSET``.
    max_premium_vol : float or None
        Upper bound on each asset's TOTAL premium volatility (common and own parts, ``Sigma_ii``).  With
        premium factors the bound is not a box in the parameters: EM runs with SQUAREM
        (extrapolations projected onto the bound), then, with one factor, the quasi-Newton finish in
        coordinates where the bound is a box (``cap_method``).  With two or more factors there is
        no quasi-Newton finish and fits converge slowly; prefer a premium prior where it does the job.
    cap_method : {"box", "projection"}
        With ``max_premium_vol`` and one premium factor: "box" (default) finishes by L-BFGS-B on
        each asset's total premium variance and the factor's share of it (both boxed;
        :class:`panel.model.em._Coords`); "projection" is SQUAREM with projection alone, to
        ``max_iter`` in practice (measured: 5,000 E-steps, still gaining 1e-3 a step, on a
        balanced N=40, T=300 panel).  :meth:`from_dict` reads settings without the key as
        "projection", so stored runs reproduce.
    premium_prior, return_prior : Prior or None
        MAP-EM priors on ``Sigma`` and ``H``.
    initial_premium : InitialPremium or None
        None -> exact diffuse start of each level at its first observation.
    tol : float
        Stop when the relative change of the objective per accepted step is below ``tol`` ...
    param_tol : float
        ... and the largest parameter change (transformed scale) is below ``param_tol``.  (With the
        quasi-Newton finish, EM hands over once its relative progress per step falls below 1e-4;
        the fit has then converged by ``loglik_tol``.)
    loglik_tol : float or None
        Stopping rule of the quasi-Newton finish, in log-likelihood units: converged when the
        objective gained less than ``loglik_tol`` over the last 3 quasi-Newton iterations and no
        free parameter's projected gradient exceeds ``loglik_tol`` per change of the parameter by
        its own size.  Variances at their floor are pinned there (an active set) and released only
        when their score says the objective increases away from the floor.  The default 1e-4 was
        chosen by measurement (simulated panels N=30-100, T=600, and the Fama-French 12
        industries): final log-likelihoods within 1e-10 relative of L-BFGS-B run to its own
        1e-10 gradient tolerance, with 0.6-0.9x its E-steps.  Looser is not kept (measured
        2026-12-03 on the six N=100, T=600 panels of ``python -m panel.bench --only ragged_fit``):
        1e-3 took a median 256.5 E-steps against 300, log-likelihoods up to 1.1e-3 lower and
        premia within 0.05 posterior standard deviations; 1e-2 took 180 but stopped up to 0.87
        short (the staircase), its premia up to 2.1 standard deviations off — the rule models the
        gain left, it does not bound it.  None is the legacy finish (L-BFGS-B
        to its own tolerance, no active set, standard errors by central differences):
        :meth:`from_dict` reads settings without the key (runs stored before it existed) as None,
        so they reproduce exactly.
    stopping : str
        How the active-set finish judges that less than ``loglik_tol`` is left to gain.
        "gain-model" (default): the gain over the last 3 iterations, the gain a Newton step on
        L-BFGS's own quadratic model would still make, both below ``loglik_tol``, and no projected
        gradient above 10 ``loglik_tol``; a forward-differenced information that is not positive
        definite is redone by central differences.  "gradient": every projected gradient below
        ``loglik_tol`` itself (more E-steps for gains below 1e-6 in all: 273 against 240 and 395
        against 317 on the N=100 benchmark panels, 219 against 188 on the Fama-French 12
        industries); :meth:`from_dict` reads settings without the key (runs stored before it existed) as
        "gradient", so they reproduce exactly.
    finish : {"direct", "filled", "auto"}
        Where a panel with gaps (returns missing inside an asset's history, or not yet published
        at the last one to three dates: :func:`panel.kalman.gapfill.fillable`) is fitted.
        "direct" (default): on the panel itself.  "filled": mostly on a copy with its gaps filled
        by their conditional means, corrected by exact E-steps and certified by the same
        ``loglik_tol`` rule (:mod:`panel.model.surrogate`; ``filled_warm``): measured on N=100,
        T=600 panels with 0.5% and 2% gaps, 5.07 s and 4.77 s against 198 s and 176 s, log-likelihoods
        5e-5 and 2e-4 apart.  Its path differs from the direct route's, and where the likelihood
        has several local optima (variances piled up at zero) the two can end in different ones:
        on 11 simulated N=60, T=300 panels with 2% gaps (the benchmark's simulator, seeds 1-11) it
        took 1.0-3.1 s against 21-68 s and ended 5e-6 to 2.6e-4 below the direct route's optimum
        on 10 of them, 0.22 below on one.  "auto": "filled" where it pays (gaps at most 10%
        of every asset's span, the exact E-step expensive and 10x the copy's, at most one premium
        and one return factor: :func:`panel.model.surrogate.route`), else "direct".  Panels without
        gaps are fitted directly either way.  :meth:`from_dict` reads settings without the key
        as "direct".
    filled_warm : bool
        How the filled-copy route (``finish``) starts its pieces.  True (default): the first fill
        from the copy's own smoother (no exact pass at the start) and each outer step's finish from
        the previous finish's coordinates and curvature pairs (:mod:`panel.model.warm`, the cap's
        boxed coordinates included; it goes on cold where its line search finds no increase).
        False: an exact pass at the start and L-BFGS-B from scratch at every outer step.
        Measured on N=100, T=600 panels with 0.5% and 2% gaps: 3 exact passes and 413 and 378
        E-steps on the copy, against 4 and 1,142 and 1,629.  :meth:`from_dict` reads settings
        without the key as False, so stored runs reproduce.
    score_form : {"disturbance", "moments"}
        How the score (Fisher's identity) of the quasi-Newton finish, the active set's release test
        and the standard errors is formed.  "disturbance" (default): from the disturbance smoother's
        terms ``r r' - N`` (Koopman & Shephard 1992) formed by every E-step path (for the premia
        everywhere; for the shocks on the stretch path's final stretch, so every balanced panel and
        filled copy; the other shocks from the moments).  "moments": ``C^{-1} (S - n C) C^{-1}``
        from the EM moments ``S``, whose difference cancels digits as a variance nears its floor: at
        the optimum of the 18 size-sorted portfolios of linearmodels' French data since 1990, two
        floored own premium variances had scores of the wrong sign and a loading's was off by a
        factor 2-5.  Measured on 18 fits (12 Fama-French portfolio sets and specs, 6 simulated
        panels): 7,807 E-steps against 4,295 (median 297 against 229), three fits stalled against
        none, and every fit ended at the same or a lower optimum (by up to 0.018); on five ragged
        Fama-French panels 2,377 against 1,213.  The terms cost 1.01-1.8x an E-step's CPU, by path.
        :meth:`from_dict` reads settings without the key as "moments".
    max_iter : int
        Maximum EM iterations (E-steps; with ``finish`` on the filled copy, its E-steps and the
        exact passes on the panel together).
    time_budget : float or None
        Seconds; a fit stopped by it has status ``time_budget``.
    acceleration : {"quasi-newton", "squarem", "none"}
        "quasi-newton": SQUAREM-accelerated EM, then L-BFGS-B with the Fisher-identity score once EM
        slows down; "squarem": EM with SQUAREM only; "none": plain EM.
    std_errors : {"auto", "always", "never"}
        "auto" computes them when the free parameters number at most 150.
    premium_vol_convention : {"yearly-change", "sqrt-ppy"}
        How premium volatilities in this spec map to per-period variances (:mod:`panel.units`).
        New specs use "yearly-change"; :meth:`from_dict` reads settings without the key (runs stored
        before it existed) as "sqrt-ppy", so they reproduce exactly.
    starts : int
        Fits from this many starting points (the moment-based rule and ``starts - 1`` deterministic
        perturbations of it); the best optimum is kept and the result says how many reached it.
    estimation : {"ml", "bayes"}
        "ml": maximum likelihood by EM (the settings above); "bayes": the posterior by Gibbs
        sampling (:mod:`panel.bayes`, DESIGN §3a) with the settings below.  Fixed volatilities, the
        premium-volatility cap, the volatility scale and the initial premium apply to both;
        ``premium_prior``/``return_prior``, ``starts`` and ``time_budget`` are ML only.
    draws, chains, warmup : Bayes: kept draws per chain, chains, discarded warm-up sweeps per chain
        (None: as many as ``draws``).
    seed : Bayes: root seed.  The sampler's seed is derived from it and the data's last date
        (:func:`panel.bayes.estimate.sampler_seed`), so every backfill vintage has its own stream
        and a run reproduces bit for bit.
    priors : Bayes: :class:`panel.bayes.Priors` or its dict (None: the documented defaults).
    summary_draws : Bayes: parameter draws at which the filter and smoother run for the premium
        summaries (bands, P(premium > 0), cross-sections).
    augment_gaps : Bayes: draw the gaps (as ``finish`` defines them) as part of the chain (data
        augmentation), so each sweep costs what it costs on a panel without them; the posterior is
        the same.  Measured on N=100, T=600 with 2% gaps: 11 ms a sweep against 496 ms, the
        same median ESS (benchmark ``python -m panel.bench.bayes``).  False integrates them out
        in every sweep (the exact dense path at the gap dates).  :meth:`from_dict` reads Bayesian
        settings without the key as False, so stored runs reproduce bit for bit.
    method : {"auto", "dense", "stretch", "balanced"}
        E-step path (:mod:`panel.kalman.paths`): "dense" is the reference; "stretch" decouples the
        panel's final balanced stretch exactly; "balanced" is "stretch" for fully balanced panels
        only; "auto" picks the cheaper by estimated cost.  All agree to rounding.
    """

    premium_factors: int | None = None
    return_shocks: str | None = None
    return_factors: int = 1
    periods_per_year: int | None = None
    vol_scale: VolScale | None = None
    fixed: tuple[tuple[str, float], ...] = field(default=())
    max_premium_vol: float | None = None
    premium_prior: Prior | None = None
    return_prior: Prior | None = None
    initial_premium: InitialPremium | None = None
    tol: float = 1e-10
    param_tol: float = 1e-6
    max_iter: int = 5000
    time_budget: float | None = None
    acceleration: str = "quasi-newton"
    std_errors: str = "auto"
    method: str = "auto"
    premium_vol_convention: str = units.YEARLY_CHANGE
    starts: int = 1
    loglik_tol: float | None = 1e-4
    stopping: str = "gain-model"
    finish: str = "direct"
    filled_warm: bool = True
    score_form: str = "disturbance"
    cap_method: str = "box"
    estimation: str = "ml"
    draws: int = BAYES_DEFAULTS["draws"]
    chains: int = BAYES_DEFAULTS["chains"]
    seed: int = BAYES_DEFAULTS["seed"]
    warmup: int | None = BAYES_DEFAULTS["warmup"]
    priors: tuple | None = BAYES_DEFAULTS["priors"]
    summary_draws: int = BAYES_DEFAULTS["summary_draws"]
    augment_gaps: bool = BAYES_DEFAULTS["augment_gaps"]

    def __post_init__(self):
        object.__setattr__(self, "fixed", _freeze(self.fixed))
        object.__setattr__(self, "priors", _freeze_priors(self.priors, self.estimation == "bayes"))

    @property
    def bayes(self) -> bool:
        return self.estimation == "bayes"

    def prior_settings(self) -> dict | None:
        """The Bayesian priors as a dict (every field; None for an ML spec)."""
        return None if self.priors is None else dict(self.priors)

    def premium_variance(self, vol: float, ppy: int) -> float:
        """Per-period premium innovation variance of a premium volatility in this spec's convention."""
        return units.premium_variance(vol, ppy, self.premium_vol_convention)

    # ---- serialisation (the store records to_dict(); reproduce rebuilds with from_dict) ----
    def to_dict(self) -> dict:
        out = asdict(self)
        out["fixed"] = dict(self.fixed)
        if self.bayes:
            out["priors"] = self.prior_settings()
        else:       # ML settings stay as they were before Bayesian estimation existed
            for key in BAYES_DEFAULTS:
                del out[key]
            del out["estimation"]
        return out

    @classmethod
    def from_dict(cls, data: dict) -> "ModelSpec":
        data = dict(data)
        unknown = set(data) - {f.name for f in fields(cls)}
        if unknown:
            raise SpecError(f"unknown model settings {sorted(unknown)}; remove them")
        # Settings stored before the convention was recorded used the legacy one.
        data.setdefault("premium_vol_convention", units.LEGACY)
        # ... and the legacy quasi-Newton finish (no active set, L-BFGS-B's own tolerance).
        data.setdefault("loglik_tol", None)
        # ... and the projected-gradient stopping rule of the active-set finish.
        data.setdefault("stopping", "gradient")
        # ... and the finish on the panel itself.
        data.setdefault("finish", "direct")
        # ... and the filled-copy route's exact start and L-BFGS-B restarted at each outer step.
        data.setdefault("filled_warm", False)
        # ... and the score from the EM moments alone.
        data.setdefault("score_form", "moments")
        # ... and the cap with premium factors kept by projection alone.
        data.setdefault("cap_method", "projection")
        # ... and Bayesian runs integrated their gaps out in every sweep.
        if data.get("estimation") == "bayes":
            data.setdefault("augment_gaps", False)
        for key, kind in (("premium_prior", Prior), ("return_prior", Prior),
                          ("initial_premium", InitialPremium), ("vol_scale", VolScale)):
            if data.get(key) is not None and not isinstance(data[key], kind):
                value = dict(data[key])
                if kind is VolScale and value.get("values") is not None:
                    value["values"] = tuple(float(v) for v in value["values"])
                data[key] = kind(**value)
        return cls(**data)

    # ---- validation against the data ----
    def resolve(self, n_assets: int, ppy_panel: int, n_dates: int, assets: tuple[str, ...]) -> "ResolvedSpec":
        """Fill defaults from the data and validate; raises :class:`SpecError` with one line."""
        N = n_assets
        k = self.premium_factors
        if k is None:
            k = 1 if N >= 3 else 0
        if not (0 <= k <= 5):
            raise SpecError(f"premium_factors must be 0..5, got {k}")
        if k > 0 and not _identifiable(N, k):
            raise SpecError(f"{k} common premium factor(s) are not identified with {N} assets; "
                            f"use fewer premium factors (0 for independent local levels)")
        _check_ranges(self)
        _check_estimation(self)
        r = int(self.return_factors)
        structure = self.return_shocks
        if structure is None and r != 1 and not _identifiable(N, r):
            raise SpecError(f"{r} return factor(s) are not identified with {N} assets; use at most "
                            f"{_most_factors(N)}")
        if structure is None:
            structure = "factor" if _identifiable(N, r) and r >= 1 else ("full" if N == 2 else "diagonal")
        if structure not in RETURN_SHOCKS:
            raise SpecError(f"return_shocks must be one of {', '.join(RETURN_SHOCKS)}, got {structure!r}")
        if structure == "factor":
            if r < 1:
                raise SpecError(f"return_factors must be >= 1 with factor return shocks, got {r}")
            if not _identifiable(N, r):
                raise SpecError(f"{r} return factor(s) are not identified with {N} assets; "
                                f"use return_shocks='full' or 'diagonal', or fewer return factors")
        if N == 1:
            structure = "diagonal"  # with one asset every structure is the same scalar variance
        ppy = int(self.periods_per_year or ppy_panel)
        if ppy < 1:
            raise SpecError(f"periods_per_year must be a positive integer, got {ppy}")
        if self.premium_vol_convention not in units.CONVENTIONS:
            raise SpecError(f"premium_vol_convention must be one of {', '.join(units.CONVENTIONS)}, "
                            f"got {self.premium_vol_convention!r}")
        fixed_q, fixed_psi = _per_asset_fixes(self.fixed, assets, ppy, self.premium_variance)
        if fixed_psi is not None and structure == "full":
            raise SpecError("return_vol can be fixed only with return_shocks='diagonal' or 'factor'")
        if self.vol_scale is not None:
            vs = self.vol_scale
            if vs.kind == "ewma" and not (vs.half_life and vs.half_life > 0):
                raise SpecError("vol_scale ewma needs a positive half_life in periods")
            if vs.kind == "series" and (vs.values is None or len(vs.values) != n_dates
                                        or min(vs.values) <= 0):
                raise SpecError(f"vol_scale series needs one positive value per date ({n_dates})")
            if vs.kind not in ("ewma", "series"):
                raise SpecError(f"vol_scale kind must be 'ewma' or 'series', got {vs.kind!r}")
        if self.acceleration not in ("quasi-newton", "squarem", "none"):
            raise SpecError(f"acceleration must be quasi-newton, squarem or none, got {self.acceleration!r}")
        if self.std_errors not in ("auto", "always", "never"):
            raise SpecError(f"std_errors must be auto, always or never, got {self.std_errors!r}")
        if not (isinstance(self.starts, int) and 1 <= self.starts <= 100):
            raise SpecError(f"starts must be a whole number from 1 to 100, got {self.starts!r}")
        if self.max_iter < 1 or not self.tol > 0:
            raise SpecError("max_iter must be >= 1 and tol > 0")
        if self.stopping not in STOPPING_RULES:
            raise SpecError(f"stopping must be one of {', '.join(STOPPING_RULES)}, got {self.stopping!r}")
        if self.finish not in FINISHES:
            raise SpecError(f"finish must be one of {', '.join(FINISHES)}, got {self.finish!r}")
        if not isinstance(self.filled_warm, bool):
            raise SpecError(f"filled_warm must be True or False, got {self.filled_warm!r}")
        if self.score_form not in SCORE_FORMS:
            raise SpecError(f"score_form must be one of {', '.join(SCORE_FORMS)}, got {self.score_form!r}")
        if self.cap_method not in CAP_METHODS:
            raise SpecError(f"cap_method must be one of {', '.join(CAP_METHODS)}, got {self.cap_method!r}")
        if self.loglik_tol is not None and not (self.loglik_tol > 0 and math.isfinite(self.loglik_tol)):
            raise SpecError(f"loglik_tol must be a positive number of log-likelihood units (or None for the "
                            f"legacy finish), got {self.loglik_tol}")
        zeros = 0 if fixed_q is None else sum(v == 0 for v in fixed_q)
        if zeros and k and zeros > k:
            raise SpecError(f"own_premium_vol is fixed at 0 for {zeros} assets but there are only {k} common "
                            "premium factor(s), so their premia would move only along the factors, which this "
                            "estimator cannot fit; fix at most as many as there are factors, or use "
                            "premium_factors=0 for constant premia")
        if zeros and self.premium_prior is not None:
            raise SpecError("a premium prior needs positive own premium variances; drop premium_prior or "
                            "the own_premium_vol fixed at 0")
        bound = None if self.max_premium_vol is None else self.premium_variance(self.max_premium_vol, ppy)
        if bound is not None and fixed_q is not None and any(v > bound for v in fixed_q if v == v):
            raise SpecError("a fixed own_premium_vol exceeds max_premium_vol; lower one of them")
        return ResolvedSpec(k=k, structure=structure, r=r if structure == "factor" else 0, ppy=ppy,
                            fixed_q=fixed_q, fixed_psi=fixed_psi, max_sigma_diag=bound,
                            score_form=self.score_form)


@dataclass(frozen=True)
class ResolvedSpec:
    """A spec with data-dependent defaults filled in (per-period units)."""

    k: int
    structure: str
    r: int
    ppy: int
    fixed_q: tuple[float, ...] | None      # per asset per-period variance, NaN = free
    fixed_psi: tuple[float, ...] | None
    max_sigma_diag: float | None
    score_form: str = "moments"


#: Accepted ranges (annualised decimals), so that no setting over- or underflows the estimator:
#: premium volatility 0.001 to 100 points a year; return volatility 0.01% to 1000% a year.
PREMIUM_VOL_RANGE = (1e-5, 1.0)
RETURN_VOL_RANGE = (1e-4, 10.0)
MAX_PRIOR_WEIGHT = 1e6          # pseudo-periods
MAX_PREMIUM_LEVEL = 10.0        # |initial premium mean|, 1000% a year


def _in_range(name: str, value, bounds, zero_ok: bool = False) -> None:
    lo, hi = bounds
    ok = isinstance(value, (int, float)) and math.isfinite(value) and (
        (zero_ok and value == 0) or lo <= value <= hi)
    if not ok:
        shown = f"{100 * value:g}%" if isinstance(value, (int, float)) else repr(value)
        raise SpecError(f"{name} must be {'0 or ' if zero_ok else ''}between {100 * lo:g}% and {100 * hi:g}% "
                        f"a year, got {shown}")


def _check_ranges(spec: "ModelSpec") -> None:
    """One-line refusals of settings that parse but would break the estimator (zero, tiny, huge or
    non-finite volatilities, priors and budgets)."""
    for key, value in spec.fixed:
        name = key.partition(":")[0]
        if name == "own_premium_vol":
            _in_range(f"fixed {key}", value, PREMIUM_VOL_RANGE, zero_ok=True)
        elif name == "return_vol":
            _in_range(f"fixed {key}", value, RETURN_VOL_RANGE)
    if spec.max_premium_vol is not None:
        _in_range("max_premium_vol", spec.max_premium_vol, PREMIUM_VOL_RANGE)
    for name, prior, bounds in (("premium_prior", spec.premium_prior, PREMIUM_VOL_RANGE),
                                ("return_prior", spec.return_prior, RETURN_VOL_RANGE)):
        if prior is not None:
            _in_range(f"{name} vol", prior.vol, bounds)
            if not (math.isfinite(prior.weight) and 0 < prior.weight <= MAX_PRIOR_WEIGHT):
                raise SpecError(f"{name} weight must be above 0 and at most {MAX_PRIOR_WEIGHT:g} "
                                f"pseudo-periods, got {prior.weight!r}")
    ip = spec.initial_premium
    if ip is not None:
        if not (math.isfinite(ip.mean) and abs(ip.mean) <= MAX_PREMIUM_LEVEL):
            raise SpecError(f"initial_premium mean must be within +-{100 * MAX_PREMIUM_LEVEL:g}% a year, "
                            f"got {ip.mean!r}")
        _in_range("initial_premium vol", ip.vol, (PREMIUM_VOL_RANGE[0], MAX_PREMIUM_LEVEL))
    if spec.time_budget is not None and not (math.isfinite(spec.time_budget) and spec.time_budget > 0):
        raise SpecError(f"time_budget must be a positive number of seconds, got {spec.time_budget!r}")
    if not (math.isfinite(spec.tol) and math.isfinite(spec.param_tol) and spec.param_tol > 0):
        raise SpecError("tol and param_tol must be positive finite numbers")
    if not isinstance(spec.return_factors, int) or spec.return_factors < 0:
        raise SpecError(f"return_factors must be a whole number >= 0, got {spec.return_factors!r}")


def _whole(value, low: int) -> bool:
    return isinstance(value, int) and not isinstance(value, bool) and value >= low


def _check_estimation(spec: "ModelSpec") -> None:
    """One-line refusals of Bayesian settings that cannot be used, or that an ML spec would ignore."""
    if spec.estimation not in ESTIMATIONS:
        raise SpecError(f"estimation must be 'ml' or 'bayes', got {spec.estimation!r}")
    if not spec.bayes:
        given = [key for key, default in BAYES_DEFAULTS.items() if getattr(spec, key) != default]
        if given:
            raise SpecError(f"{', '.join(given)} apply to Bayesian estimation only; add "
                            "estimation='bayes' (--bayes) or drop them")
        return
    for name, low in (("draws", 1), ("chains", 1), ("seed", 0), ("summary_draws", 1)):
        if not _whole(getattr(spec, name), low):
            raise SpecError(f"{name} must be a whole number >= {low}, got {getattr(spec, name)!r}")
    if not isinstance(spec.augment_gaps, bool):
        raise SpecError(f"augment_gaps must be True or False, got {spec.augment_gaps!r}")
    if spec.warmup is not None and not _whole(spec.warmup, 0):
        raise SpecError(f"warmup must be a whole number >= 0 (or None: as many as draws), got {spec.warmup!r}")
    for name in ("premium_prior", "return_prior"):
        if getattr(spec, name) is not None:
            raise SpecError(f"{name} (--{name.replace('_', '-')}) is a prior of ML estimation; with "
                            "estimation='bayes' state priors with priors=Priors(...) (--prior "
                            "NAME=VALUE) instead")
    if spec.finish != "direct":
        raise SpecError("finish (--gaps) applies to ML estimation only; drop it for estimation='bayes' "
                        "(the sampler draws the gaps itself: augment_gaps)")
    if spec.starts != 1 or spec.time_budget is not None:
        raise SpecError("starts and time_budget apply to ML estimation only; drop them for "
                        "estimation='bayes' (several chains guard against a poor start)")


def _most_factors(n: int) -> int:
    return max((m for m in range(1, n) if _identifiable(n, m)), default=0)


def _identifiable(n: int, m: int) -> bool:
    """Ledermann bound for an m-factor covariance of n variables: (n - m)^2 >= n + m."""
    return 1 <= m < n and (n - m) ** 2 >= n + m


def _per_asset_fixes(fixed, assets, ppy, premium_variance):
    out = {"own_premium_vol": None, "return_vol": None}
    to_variance = {"own_premium_vol": premium_variance, "return_vol": units.return_variance}
    for key, value in fixed:
        name, _, asset = key.partition(":")
        if name not in FIXABLE:
            raise SpecError(f"cannot fix {key!r}; fixable: own_premium_vol, return_vol (optionally NAME:ASSET)")
        if not (value >= 0 and math.isfinite(value)):
            raise SpecError(f"fixed {key} must be a non-negative annualised volatility, got {value}")
        if asset and asset not in assets:
            raise SpecError(f"fixed {key}: no asset {asset!r} in the panel")
        arr = out[name] or [math.nan] * len(assets)
        for i, a in enumerate(assets):
            if not asset or a == asset:
                arr[i] = to_variance[name](value, ppy)
        out[name] = arr
    q, psi = out["own_premium_vol"], out["return_vol"]
    return (tuple(q) if q else None), (tuple(psi) if psi else None)
