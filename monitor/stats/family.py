"""Candidate families: one scan refits every candidate, ranks them, tests nested pairs
and says whether the chosen model still deserves its place.

A *family* is a response, two or more named candidate formulas, the chosen one,
the information criterion that ranks them (AIC, BIC or AICc), the significance
level of the F-tests and the margin of the criterion within which the chosen
model still counts as good enough.

Row policy (common rows)
------------------------
The union of every candidate's columns is encoded once and read into one
least-squares state (:func:`monitor.stats.fitting.pass_one`); each candidate is a
column subset of that state.  A row that is unusable in *any* candidate's column
(missing, non-finite, an unseen level) is left out for *every* candidate, so all
candidates are fitted to the same rows and their likelihoods and criteria stay
comparable (criteria of models fitted to different rows cannot be compared).
The price: a column that only one candidate reads can cost the others rows.
:class:`FamilyRows` reports the rows read, used and left out, per column, and for
each candidate which left-out counts came from columns it does not read.

Conventions
-----------
* ``n_params`` counts the mean coefficients (intercept included, aliased
  columns excluded), as :mod:`monitor.stats.results` does for AIC and BIC; AICc is
  Hurvich & Tsai's, which also counts the error variance.
* ``delta`` is the chosen criterion minus its smallest value in the family
  (``Δ ≥ 0``); the Akaike weight is ``exp(−Δ/2) / Σ exp(−Δ_j/2)`` and the
  evidence ratio of the best candidate against candidate *i* is
  ``w_best / w_i = exp(Δ_i / 2)`` (Burnham & Anderson 2002, §2.9–2.10 [from
  memory: section numbers]).  The same formulas are applied to whichever
  criterion ranks the family; with BIC the weights approximate posterior model
  probabilities under equal prior odds (Schwarz 1978; Kass & Raftery 1995).
* Nesting is structural: candidate A is nested in B when A's design columns
  (after encoding, as indices into the union) are a subset of B's and B has an
  intercept whenever A has one.  Reparametrisations with the same column span
  but different columns (``y ~ 0 + g`` against ``y ~ g``) are not recognised as
  nested; compare those by the criterion only.
* Partial F-test of the ``q = rank_larger − rank_smaller`` restrictions:
  ``F = [(SSR_s − SSR_l)/q] / [SSR_l/(n − rank_l)]`` against ``F(q, n − rank_l)``,
  exact under iid normal errors; the likelihood ratio
  ``LR = 2(ℓ_l − ℓ_s) = n·ln(SSR_s/SSR_l)`` against ``χ²(q)``, asymptotic
  (over-sized in small samples; prefer F for least squares).  A negative
  ``SSR_s − SSR_l`` (rounding, when the extra columns explain nothing) is set to
  zero.  With ``q = 0`` (the extra columns are aliased) both tests are undefined
  (``nan``).

Verdict wording
---------------
How strong the evidence against the chosen model is, in the wording of Burnham &
Anderson (2002), *Model Selection and Multimodel Inference*, 2nd ed., Springer,
§2.6, p. 70 [from memory: wording and page not checked against the printed book
here]: Δ 0–2 "substantial support", 4–7 "considerably less support", > 10
"essentially no support"; the ranges 2–4 and 7–10 are left unlabelled there and
are reported as unlabelled here.  The guidance was written for AIC-type
differences (AIC, AICc); it is applied to BIC differences as is, with a note.

References
----------
Akaike, H. (1974). A new look at the statistical model identification. IEEE
Transactions on Automatic Control 19(6), 716-723.
Schwarz, G. (1978). Estimating the dimension of a model. Annals of Statistics
6(2), 461-464.
Hurvich, C. M., Tsai, C.-L. (1989). Regression and time series model selection in
small samples. Biometrika 76(2), 297-307.
Burnham, K. P., Anderson, D. R. (2002). Model Selection and Multimodel Inference,
2nd ed. Springer, §2.6 (p. 70) and §2.9.
Kass, R. E., Raftery, A. E. (1995). Bayes factors. Journal of the American
Statistical Association 90(430), 773-795.
Draper, N. R., Smith, H. (1998). Applied Regression Analysis, 3rd ed., Wiley,
§6 (the extra-sum-of-squares F-test).
"""

from __future__ import annotations

import dataclasses
import math
from collections.abc import Callable, Iterable, Mapping, Sequence
from dataclasses import dataclass, field
from typing import Any

from scipy import stats

from ..errors import ConfigurationError, FormulaError, ModelFitError
from .engine import SubsetFactor
from .fitting import (
    ChunkSource,
    PassOne,
    _design_over_all_chunks,
    derive_factor,
    pass_one,
    refine_factors,
    result_of,
)
from .formula import CategoricalSpec, Design, ParsedFormula, parse_formula
from .results import FitResult, to_jsonable

__all__ = [
    "CRITERIA",
    "SUPPORT_SOURCE",
    "SUPPORT_WORDING",
    "CandidateRank",
    "FamilyReport",
    "FamilyRows",
    "FamilySpec",
    "NestedTest",
    "Verdict",
    "compare_fits",
    "evaluate_family",
    "make_family_spec",
    "nesting_pairs",
    "nested_test",
    "support_band",
]

#: Criteria a family can be ranked by, with their display names.
CRITERIA: dict[str, str] = {"aic": "AIC", "bic": "BIC", "aicc": "AICc"}

#: Where the verdict's wording of Δ comes from (and that it is quoted from memory).
SUPPORT_SOURCE = (
    "Burnham & Anderson (2002), Model Selection and Multimodel Inference, 2nd ed., §2.6, "
    "p. 70 (wording from memory, not checked against the printed page)"
)

#: Burnham & Anderson's bands of Δ: code and wording.  2–4 and 7–10 are unlabelled there.
SUPPORT_WORDING: dict[str, str] = {
    "substantial": "substantial support",
    "unlabelled_2_4": "Δ between 2 and 4, a range the guidance leaves unlabelled",
    "considerably_less": "considerably less support",
    "unlabelled_7_10": "Δ between 7 and 10, a range the guidance leaves unlabelled",
    "essentially_none": "essentially no support",
    "undefined": "Δ is undefined (the criterion could not be computed)",
}


# ======================================================================================
# The family specification


@dataclass(frozen=True, slots=True)
class FamilySpec:
    """A validated family.  Build it with :func:`make_family_spec`, which checks it.

    Attributes
    ----------
    response
        The response as written (a column or a transform such as ``log(load)``).
    candidates
        ``(name, formula)`` pairs in the declared order.
    chosen
        Name of the model in production.
    criterion
        ``"aic"``, ``"bic"`` or ``"aicc"``: what ranks the candidates.
    alpha
        Significance level of the overall and partial F-tests.
    margin
        The chosen model still counts as good enough while its Δ ≤ ``margin``.
    categorical
        Declared levels per categorical column, as ``(column, spec)`` pairs.
    """

    response: str
    candidates: tuple[tuple[str, str], ...]
    chosen: str
    criterion: str = "aic"
    alpha: float = 0.05
    margin: float = 2.0
    categorical: tuple[tuple[str, CategoricalSpec], ...] = ()

    @property
    def names(self) -> tuple[str, ...]:
        return tuple(name for name, _ in self.candidates)

    @property
    def formulas(self) -> tuple[str, ...]:
        return tuple(formula for _, formula in self.candidates)

    def formula_of(self, name: str) -> str:
        return dict(self.candidates)[name]

    def categorical_mapping(self) -> dict[str, CategoricalSpec]:
        return dict(self.categorical)

    def columns(self) -> tuple[str, ...]:
        """Every data column the family reads (the union), response first."""
        seen: list[str] = []
        for formula in self.formulas:
            for column in parse_formula(formula).columns:
                if column not in seen:
                    seen.append(column)
        return tuple(seen)

    def to_dict(self) -> dict[str, Any]:
        """The family-file keys (``response``, ``chosen``, ``criterion``, ``alpha``,
        ``margin``, ``candidates``)."""
        data: dict[str, Any] = {
            "response": self.response,
            "chosen": self.chosen,
            "criterion": self.criterion,
            "alpha": self.alpha,
            "margin": self.margin,
            "candidates": dict(self.candidates),
        }
        if self.categorical:
            data["categorical"] = {
                column: {"levels": None if spec.levels is None else list(spec.levels),
                         "reference": spec.reference}
                for column, spec in self.categorical}
        return data


def _is_number(value: Any) -> bool:
    return isinstance(value, (int, float)) and not isinstance(value, bool)


def _term_signature(parsed: ParsedFormula) -> tuple[frozenset[frozenset[str]], bool]:
    terms = frozenset(frozenset(factor.label for factor in term) for term in parsed.terms)
    return terms, parsed.has_intercept


def make_family_spec(
    *,
    response: str,
    candidates: Mapping[str, str] | Sequence[tuple[str, str]],
    chosen: str,
    criterion: str = "aic",
    alpha: float = 0.05,
    margin: float = 2.0,
    categorical: Mapping[str, CategoricalSpec] | None = None,
    where: str = "family",
) -> FamilySpec:
    """Check a family and return it as a :class:`FamilySpec`.

    ``where`` is the key path of the family in its configuration (for example
    ``"monitors.heat.family"``); every error names the offending key below it.

    Raises
    ------
    ConfigurationError
        Fewer than two candidates, an empty or duplicate name (names that differ
        only in letter case count as duplicates: history tables on case-insensitive
        databases could not tell them apart), a formula that does not parse, a
        candidate whose response is not the family's, two candidates with the same
        terms and intercept, an unknown ``chosen`` name or criterion, ``alpha``
        outside (0, 1) or a negative or non-finite ``margin``.
    """
    if not isinstance(response, str) or not response.strip():
        raise ConfigurationError(f"the response must be a non-empty text, got {response!r}",
                                 where=f"{where}.response",
                                 hint='name the response column, e.g. response = "load"')
    try:
        response_label = parse_formula(f"{response} ~ 1").response.label
    except FormulaError as error:
        raise ConfigurationError(f"the response {response!r} is not a column or transform: "
                                 f"{error.what.splitlines()[0]}", where=f"{where}.response",
                                 hint="write one column name or one transform such as "
                                 "log(load)") from error
    pairs = list(candidates.items()) if isinstance(candidates, Mapping) else list(candidates)
    if len(pairs) < 2:
        raise ConfigurationError(
            f"a family needs at least 2 candidates, got {len(pairs)}",
            where=f"{where}.candidates",
            hint="list the chosen model and at least one alternative (smaller or larger) "
            "to compare it with")
    seen: dict[str, str] = {}
    parsed_of: dict[str, ParsedFormula] = {}
    clean: list[tuple[str, str]] = []
    for pair in pairs:
        if not (isinstance(pair, tuple) and len(pair) == 2):
            raise ConfigurationError(f"a candidate must be a (name, formula) pair, got {pair!r}",
                                     where=f"{where}.candidates",
                                     hint='write candidates as name = "formula"')
        name, formula = pair
        if not isinstance(name, str) or not name.strip():
            raise ConfigurationError(f"candidate names must be non-empty text, got {name!r}",
                                     where=f"{where}.candidates",
                                     hint="give every candidate a short name, e.g. base = ...")
        name = name.strip()
        key = name.casefold()
        if key in seen:
            raise ConfigurationError(
                f"candidate names {seen[key]!r} and {name!r} are the same"
                + ("" if seen[key] == name else " apart from letter case"),
                where=f"{where}.candidates.{name}",
                hint="give every candidate its own name (names are compared ignoring case, "
                "because history tables may be case-insensitive)")
        seen[key] = name
        if not isinstance(formula, str):
            raise ConfigurationError(f"the formula of candidate {name!r} must be text, got "
                                     f"{type(formula).__name__}",
                                     where=f"{where}.candidates.{name}",
                                     hint='write it in quotes, e.g. base = "load ~ temp"')
        try:
            parsed = parse_formula(formula)
        except FormulaError as error:
            raise ConfigurationError(error.what, where=f"{where}.candidates.{name}",
                                     hint=error.hint or "fix the formula") from error
        if parsed.response.label != response_label:
            raise ConfigurationError(
                f"candidate {name!r} models {parsed.response.label!r}, but the family's "
                f"response is {response_label!r}",
                where=f"{where}.candidates.{name}",
                hint="every candidate must have the same response (criteria of different "
                "responses cannot be compared); fix the formula or the family's response")
        signature = _term_signature(parsed)
        for other, other_parsed in parsed_of.items():
            if _term_signature(other_parsed) == signature:
                raise ConfigurationError(
                    f"candidates {other!r} and {name!r} are the same model "
                    f"({other_parsed.text!r} and {parsed.text!r} have the same terms)",
                    where=f"{where}.candidates.{name}",
                    hint="remove one of them or change its terms")
        parsed_of[name] = parsed
        clean.append((name, formula))
    if not isinstance(chosen, str) or chosen.strip() not in dict(clean):
        known = ", ".join(repr(n) for n, _ in clean)
        raise ConfigurationError(f"the chosen model {chosen!r} is not one of the candidates",
                                 where=f"{where}.chosen",
                                 hint=f"set it to one of {known}")
    if not isinstance(criterion, str) or criterion.strip().lower() not in CRITERIA:
        raise ConfigurationError(f"unknown criterion {criterion!r}", where=f"{where}.criterion",
                                 hint="use one of " + ", ".join(repr(c) for c in CRITERIA))
    if not _is_number(alpha) or not 0.0 < float(alpha) < 1.0:
        raise ConfigurationError(f"alpha must be a number between 0 and 1, got {alpha!r}",
                                 where=f"{where}.alpha",
                                 hint="the usual choice is 0.05 (common practice, not a law)")
    if not _is_number(margin) or not math.isfinite(float(margin)) or float(margin) < 0.0:
        raise ConfigurationError(f"margin must be a finite number ≥ 0, got {margin!r}",
                                 where=f"{where}.margin",
                                 hint="the default 2 follows Burnham & Anderson's 'substantial "
                                 "support' band (from memory)")
    declared = tuple(sorted((categorical or {}).items()))
    for column, spec in declared:
        if not isinstance(spec, CategoricalSpec):
            raise ConfigurationError(f"categorical column {column!r} must be declared with a "
                                     f"CategoricalSpec, got {type(spec).__name__}",
                                     where=f"{where}.categorical.{column}",
                                     hint="use monitor.CategoricalSpec(levels=..., reference=...)")
    return FamilySpec(response=response.strip(), candidates=tuple(clean), chosen=chosen.strip(),
                      criterion=criterion.strip().lower(), alpha=float(alpha),
                      margin=float(margin), categorical=declared)


# ======================================================================================
# Result objects


@dataclass(frozen=True, slots=True)
class CandidateRank:
    """One candidate's line of the ranking (order: best first under the criterion).

    ``evidence_ratio`` is ``w_best / w_this = exp(Δ/2)``: how many times more
    likely the best candidate is, in the criterion's sense.  ``rank_deficiency``
    counts design columns that were aliased (not estimable) and left out.
    """

    position: int
    name: str
    formula: str
    n: int
    n_params: int
    rank_deficiency: int
    aliased_terms: tuple[str, ...]
    log_likelihood: float
    aic: float
    bic: float
    aicc: float
    delta: float
    weight: float
    evidence_ratio: float
    r_squared: float
    adj_r_squared: float
    ss_resid: float
    f_statistic: float
    f_pvalue: float
    is_chosen: bool
    is_best: bool

    def to_dict(self) -> dict[str, Any]:
        data = dataclasses.asdict(self)
        data["aliased_terms"] = list(self.aliased_terms)
        return to_jsonable(data)  # type: ignore[no-any-return]


@dataclass(frozen=True, slots=True)
class NestedTest:
    """Partial F-test and likelihood-ratio test of a smaller candidate inside a larger one.

    ``df`` is the number of restrictions ``q`` (rank difference); ``df_resid`` the
    larger model's residual degrees of freedom.  ``roles`` says why the pair is
    reported: ``"chosen_vs_smaller"``, ``"chosen_vs_larger"``, ``"best_vs_chosen"``.
    ``rejects`` is whether the F-test rejects the smaller model at ``alpha``
    (``None`` when undefined).
    """

    smaller: str
    larger: str
    roles: tuple[str, ...]
    df: int
    df_resid: int
    ss_difference: float
    f_statistic: float
    f_pvalue: float
    lr_statistic: float
    lr_pvalue: float
    alpha: float
    rejects: bool | None

    def to_dict(self) -> dict[str, Any]:
        data = dataclasses.asdict(self)
        data["roles"] = list(self.roles)
        return to_jsonable(data)  # type: ignore[no-any-return]


@dataclass(frozen=True, slots=True)
class Verdict:
    """Is the chosen model still the best?  Plain data plus one human sentence.

    ``delta`` is the chosen model's criterion minus the best one's (0 when it is
    the best); ``support`` is the Burnham & Anderson band of that Δ as a code
    (``substantial``, ``unlabelled_2_4``, ``considerably_less``,
    ``unlabelled_7_10``, ``essentially_none``) and ``support_wording`` in words.
    ``nested_direction`` is ``"best_nests_chosen"``, ``"chosen_nests_best"`` or
    ``None``; ``nested_f_pvalue`` the partial F-test of that pair.
    ``chosen_is_useful`` is whether the chosen model's overall F-test rejects
    "all slopes zero" at ``alpha`` (``None`` when it has no slopes to test).
    """

    chosen: str
    best: str
    criterion: str
    chosen_is_best: bool
    delta: float
    margin: float
    chosen_within_margin: bool
    chosen_weight: float
    best_weight: float
    evidence_ratio: float
    support: str
    support_wording: str
    support_source: str
    nested_direction: str | None
    nested_f_pvalue: float | None
    nested_rejects: bool | None
    alpha: float
    chosen_f_pvalue: float
    chosen_is_useful: bool | None
    summary: str

    def to_dict(self) -> dict[str, Any]:
        return to_jsonable(dataclasses.asdict(self))  # type: ignore[no-any-return]


@dataclass(frozen=True, slots=True)
class FamilyRows:
    """The one scan's row counts under the common-rows policy.

    ``left_out_by_other_columns[name]`` lists, for candidate ``name``, the
    left-out counts of data columns that candidate does not read (a row can be
    counted under several columns).  ``data_reads`` is how many times the rows
    were read (1 for the state, plus the refinement passes), whatever the
    number of candidates; ``chunks_absorbed`` the chunks the engine took in.
    """

    rows_read: int
    rows_used: int
    dropped_rows: int
    dropped_by_column: Mapping[str, int]
    unseen_levels: Mapping[str, Mapping[str, int]]
    left_out_by_other_columns: Mapping[str, Mapping[str, int]]
    chunks_absorbed: int
    data_reads: int
    policy: str = ("common rows: a row unusable in any candidate's column is left out for "
                   "every candidate, so all criteria are computed on the same rows")

    def to_dict(self) -> dict[str, Any]:
        return to_jsonable(dataclasses.asdict(self))  # type: ignore[no-any-return]


@dataclass(frozen=True, slots=True)
class FamilyReport:
    """Everything one evaluation of a family reports.

    ``fits`` maps candidate name to its :class:`FitResult` (declared order);
    ``ranking`` is best first; ``nesting`` lists every structural
    ``(smaller, larger)`` pair; ``nested`` the tests of the pairs the verdict
    uses; ``checks`` maps candidate name to assumption-check results (filled by
    the nightly run; empty here).
    """

    family: FamilySpec
    fits: Mapping[str, FitResult]
    ranking: tuple[CandidateRank, ...]
    nesting: tuple[tuple[str, str], ...]
    nested: tuple[NestedTest, ...]
    verdict: Verdict
    rows: FamilyRows | None = None
    checks: Mapping[str, tuple[Any, ...]] = field(default_factory=dict)

    def to_dict(self) -> dict[str, Any]:
        """Plain JSON data: ``family``, ``rows``, ``ranking``, ``nested``, ``nesting``,
        ``verdict``, ``fits``, ``checks``."""
        return {
            "family": to_jsonable(self.family.to_dict()),
            "rows": None if self.rows is None else self.rows.to_dict(),
            "ranking": [row.to_dict() for row in self.ranking],
            "nested": [test.to_dict() for test in self.nested],
            "nesting": [{"smaller": small, "larger": large} for small, large in self.nesting],
            "verdict": self.verdict.to_dict(),
            "fits": {name: fit.to_dict() for name, fit in self.fits.items()},
            "checks": {name: [_check_to_jsonable(c) for c in results]
                       for name, results in self.checks.items()},
        }


def _check_to_jsonable(result: Any) -> Any:
    if hasattr(result, "to_dict"):
        return to_jsonable(result.to_dict())
    if dataclasses.is_dataclass(result) and not isinstance(result, type):
        return to_jsonable(dataclasses.asdict(result))
    return to_jsonable(result)


# ======================================================================================
# Statistics


def support_band(delta: float) -> tuple[str, str]:
    """Burnham & Anderson's band of a Δ as ``(code, wording)``; see the module notes.

    Δ ≤ 2 substantial; 2 < Δ < 4 unlabelled; 4 ≤ Δ ≤ 7 considerably less;
    7 < Δ ≤ 10 unlabelled; Δ > 10 essentially none.  ``nan`` gives ``("undefined", ...)``.
    """
    if math.isnan(delta):
        code = "undefined"
    elif delta <= 2.0:
        code = "substantial"
    elif delta < 4.0:
        code = "unlabelled_2_4"
    elif delta <= 7.0:
        code = "considerably_less"
    elif delta <= 10.0:
        code = "unlabelled_7_10"
    else:
        code = "essentially_none"
    return code, SUPPORT_WORDING[code]


def _deltas(values: Sequence[float]) -> list[float]:
    """``value − min`` with the infinities handled: −inf ties at 0, +inf is inf, nan stays."""
    finite_or_minus = [v for v in values if not math.isnan(v)]
    if not finite_or_minus:
        return [math.nan] * len(values)
    low = min(finite_or_minus)
    out: list[float] = []
    for v in values:
        if math.isnan(v):
            out.append(math.nan)
        elif v == low:
            out.append(0.0)
        elif math.isinf(low) or math.isinf(v):
            out.append(math.inf)
        else:
            out.append(v - low)
    return out


def _weights(deltas: Sequence[float]) -> list[float]:
    """Akaike weights ``exp(−Δ/2)/Σ exp(−Δ_j/2)``; a ``nan`` Δ gets weight ``nan``."""
    terms = [math.exp(-d / 2.0) if not math.isnan(d) else 0.0 for d in deltas]
    total = math.fsum(terms)
    return [(t / total) if not math.isnan(d) and total > 0 else math.nan
            for t, d in zip(terms, deltas, strict=True)]


def _criterion(fit: FitResult, criterion: str) -> float:
    return float(getattr(fit, criterion))


def nested_test(smaller: FitResult, larger: FitResult, *, alpha: float = 0.05,
                names: tuple[str, str] = ("smaller", "larger"),
                roles: tuple[str, ...] = ()) -> NestedTest:
    """Partial F-test and LR test of ``smaller`` (restricted) inside ``larger``.

    Both fits must come from the same rows (a family's common rows); see the
    module notes for the formulas.  Agrees with statsmodels
    ``larger.compare_f_test(smaller)`` and ``larger.compare_lr_test(smaller)``.
    """
    q = larger.rank - smaller.rank
    df_resid = larger.df_resid
    difference = max(smaller.ss_resid - larger.ss_resid, 0.0)
    if q <= 0 or df_resid <= 0:
        f_statistic = f_pvalue = lr_statistic = lr_pvalue = math.nan
    elif larger.ss_resid <= 0.0:
        f_statistic = lr_statistic = math.inf if difference > 0 else math.nan
        f_pvalue = lr_pvalue = 0.0 if difference > 0 else math.nan
    else:
        f_statistic = (difference / q) / (larger.ss_resid / df_resid)
        f_pvalue = float(stats.f.sf(f_statistic, q, df_resid))
        lr_statistic = larger.n * math.log1p(difference / larger.ss_resid)
        lr_pvalue = float(stats.chi2.sf(lr_statistic, q))
    rejects = None if math.isnan(f_pvalue) else bool(f_pvalue < alpha)
    return NestedTest(smaller=names[0], larger=names[1], roles=roles, df=int(q),
                      df_resid=int(df_resid), ss_difference=float(difference),
                      f_statistic=float(f_statistic), f_pvalue=float(f_pvalue),
                      lr_statistic=float(lr_statistic), lr_pvalue=float(lr_pvalue),
                      alpha=float(alpha), rejects=rejects)


def nesting_pairs(names: Sequence[str],
                  structure: Sequence[tuple[Iterable[int], bool]]) -> tuple[tuple[str, str], ...]:
    """Every ``(smaller, larger)`` pair where ``smaller`` is structurally nested in ``larger``.

    ``structure[i]`` is candidate ``i``'s design columns (indices into the
    family's union of columns) and whether it has an intercept.
    """
    shapes = [(frozenset(columns), bool(intercept)) for columns, intercept in structure]
    pairs = []
    for i, (columns_i, intercept_i) in enumerate(shapes):
        for j, (columns_j, intercept_j) in enumerate(shapes):
            if i == j or shapes[i] == shapes[j]:
                continue
            if columns_i <= columns_j and (intercept_j or not intercept_i):
                pairs.append((names[i], names[j]))
    return tuple(pairs)


def _neighbours(chosen: str, pairs: Sequence[tuple[str, str]]) -> tuple[list[str], list[str]]:
    """Immediate neighbours of ``chosen`` in the nesting order: (smaller ones, larger ones)."""
    inside = {a for a, b in pairs if b == chosen}
    outside = {b for a, b in pairs if a == chosen}
    relation = set(pairs)
    smaller = [a for a in inside if not any((a, m) in relation for m in inside if m != a)]
    larger = [b for b in outside if not any((m, b) in relation for m in outside if m != b)]
    return smaller, larger


def compare_fits(
    spec: FamilySpec,
    fits: Sequence[FitResult],
    structure: Sequence[tuple[Iterable[int], bool]],
    *,
    rows: FamilyRows | None = None,
) -> FamilyReport:
    """Rank fitted candidates, test the nested neighbours and build the verdict.

    ``fits`` are in the order of ``spec.candidates`` and must share their rows;
    ``structure`` gives each candidate's design columns (union indices) and
    intercept flag, for nesting.
    """
    names = spec.names
    by_name = dict(zip(names, fits, strict=True))
    values = [_criterion(fit, spec.criterion) for fit in fits]
    deltas = _deltas(values)
    weights = _weights(deltas)
    order_of = {name: i for i, name in enumerate(names)}
    # ties: the chosen model first (it keeps its place on a tie), then fewer parameters,
    # then the declared order
    order = sorted(range(len(names)), key=lambda i: (
        math.inf if math.isnan(deltas[i]) else deltas[i], names[i] != spec.chosen,
        fits[i].rank, i))
    best = names[order[0]]
    ranking = []
    for position, i in enumerate(order, start=1):
        fit = fits[i]
        delta = deltas[i]
        evidence = (math.exp(delta / 2.0) if delta < 1400 else math.inf) if not math.isnan(
            delta) else math.nan
        ranking.append(CandidateRank(
            position=position, name=names[i], formula=fit.formula, n=fit.n, n_params=fit.rank,
            rank_deficiency=len(fit.aliased_terms), aliased_terms=fit.aliased_terms,
            log_likelihood=fit.log_likelihood, aic=fit.aic, bic=fit.bic, aicc=fit.aicc,
            delta=float(delta), weight=float(weights[i]), evidence_ratio=float(evidence),
            r_squared=fit.r_squared, adj_r_squared=fit.adj_r_squared, ss_resid=fit.ss_resid,
            f_statistic=fit.f_statistic, f_pvalue=fit.f_pvalue,
            is_chosen=names[i] == spec.chosen, is_best=names[i] == best))

    pairs = nesting_pairs(names, structure)
    smaller, larger = _neighbours(spec.chosen, pairs)
    roles: dict[tuple[str, str], list[str]] = {}
    for name in sorted(smaller, key=order_of.__getitem__):
        roles.setdefault((name, spec.chosen), []).append("chosen_vs_smaller")
    for name in sorted(larger, key=order_of.__getitem__):
        roles.setdefault((spec.chosen, name), []).append("chosen_vs_larger")
    direction: str | None = None
    if best != spec.chosen:
        if (spec.chosen, best) in pairs:
            direction = "best_nests_chosen"
            roles.setdefault((spec.chosen, best), []).append("best_vs_chosen")
        elif (best, spec.chosen) in pairs:
            direction = "chosen_nests_best"
            roles.setdefault((best, spec.chosen), []).append("best_vs_chosen")
    nested = tuple(
        nested_test(by_name[small], by_name[large], alpha=spec.alpha, names=(small, large),
                    roles=tuple(why))
        for (small, large), why in roles.items())
    verdict = _verdict(spec, by_name, best, dict(zip(names, deltas, strict=True)),
                       dict(zip(names, weights, strict=True)), direction,
                       next((t for t in nested if "best_vs_chosen" in t.roles), None))
    return FamilyReport(family=spec, fits=by_name, ranking=tuple(ranking), nesting=pairs,
                        nested=nested, verdict=verdict, rows=rows)


def _p(value: float) -> str:
    return f"{value:.2g}" if value < 0.001 else f"{value:.3f}"


def _w(value: float) -> str:
    return f"{value:.1e}" if 0 < value < 0.005 else f"{value:.2f}"


def _verdict(spec: FamilySpec, fits: Mapping[str, FitResult], best: str,
             deltas: Mapping[str, float], weights: Mapping[str, float],
             direction: str | None, test: NestedTest | None) -> Verdict:
    chosen = spec.chosen
    label = CRITERIA[spec.criterion]
    delta = deltas[chosen]
    code, wording = support_band(delta)
    within = bool(delta <= spec.margin)
    evidence = (math.exp(delta / 2.0) if delta < 1400 else math.inf) if not math.isnan(
        delta) else math.nan
    chosen_fit = fits[chosen]
    f_pvalue = chosen_fit.f_pvalue
    useful = None if math.isnan(f_pvalue) else bool(f_pvalue < spec.alpha)

    if best == chosen:
        sentence = (f"{chosen!r} is still the best of {len(fits)} candidates by {label} "
                    f"(weight {_w(weights[chosen])})")
    else:
        sentence = (f"{chosen!r} trails {best!r} by Δ{label} = {delta:.2f} (weight "
                    f"{_w(weights[chosen])}), {'within' if within else 'outside'} the margin of "
                    f"{spec.margin:g}: {wording} in Burnham & Anderson's terms")
        if spec.criterion == "bic":
            sentence += " (written for AIC differences)"
    if test is not None and test.rejects is not None:
        extra = "the extra terms of " + repr(test.larger)
        outcome = "are significant" if test.rejects else "are not significant"
        sentence += (f"; {extra} {outcome} at {spec.alpha:g} by the partial F-test "
                     f"(p = {_p(test.f_pvalue)})")
    if useful is None:
        sentence += f"; {chosen!r} has no slopes for an overall F-test"
    elif useful:
        sentence += (f"; its overall F-test rejects 'all slopes zero' at {spec.alpha:g} "
                     f"(p = {_p(f_pvalue)})")
    else:
        sentence += (f"; but its overall F-test does not reject 'all slopes zero' at "
                     f"{spec.alpha:g} (p = {_p(f_pvalue)}), so it may explain nothing")
    return Verdict(
        chosen=chosen, best=best, criterion=spec.criterion, chosen_is_best=best == chosen,
        delta=float(delta), margin=spec.margin, chosen_within_margin=within,
        chosen_weight=float(weights[chosen]), best_weight=float(weights[best]),
        evidence_ratio=float(evidence), support=code, support_wording=wording,
        support_source=SUPPORT_SOURCE, nested_direction=direction,
        nested_f_pvalue=None if test is None else float(test.f_pvalue),
        nested_rejects=None if test is None else test.rejects, alpha=spec.alpha,
        chosen_f_pvalue=float(f_pvalue), chosen_is_useful=useful, summary=sentence + ".")


# ======================================================================================
# One scan for the whole family


def prepare_candidates(
    spec: FamilySpec,
    chunks: Iterable[Mapping[str, Any]],
    *,
    design: Design | None = None,
    strict: bool = False,
    read_again: Callable[[], Iterable[Mapping[str, Any]]] | None = None,
    all_chunks: ChunkSource | None = None,
) -> tuple[PassOne, list[SubsetFactor]]:
    """Pass 1 over the union of the candidates' columns, and every candidate's factor.

    Refuses candidates that are the same model after encoding; too few rows for a
    candidate names it.  When the design is frozen here (``design`` is None) and a
    level of an undeclared categorical column was missing from the first chunk,
    ``all_chunks`` collects the levels over every chunk and ``read_again`` repeats
    pass 1 with them (only then: most windows never pay for it).
    """
    formulas = [parse_formula(text) for text in spec.formulas]
    if design is not None and tuple(f.text for f in design.formulas) != spec.formulas:
        raise ConfigurationError("the design given was built for other formulas",
                                 where="family design",
                                 hint="rebuild the baseline design from this family's candidates")
    one = pass_one(chunks, formulas, design=design, categorical=spec.categorical_mapping(),
                   strict=strict)
    if (design is None and one.totals.unseen_levels and read_again is not None
            and all_chunks is not None):
        full = _design_over_all_chunks(all_chunks, formulas, spec.categorical_mapping())
        one = pass_one(read_again(), formulas, design=full,
                       categorical=spec.categorical_mapping(), strict=strict)
    names = spec.names
    shapes: dict[tuple[frozenset[int], bool], str] = {}
    for name, (indices, has_intercept) in zip(names, one.design.models, strict=True):
        shape = (frozenset(indices), has_intercept)
        if shape in shapes:
            raise ConfigurationError(
                f"candidates {shapes[shape]!r} and {name!r} are the same model after encoding "
                f"(same design columns and intercept)", where=f"family.candidates.{name}",
                hint="remove one of them or change its terms")
        shapes[shape] = name
    factors = []
    for m, name in enumerate(names):
        try:
            factors.append(derive_factor(one, m))
        except ModelFitError as error:
            raise ModelFitError(error.what, where=f"candidate {name!r} ({error.where})",
                                hint=error.hint) from error
    return one, factors


def family_rows(spec: FamilySpec, one: PassOne, reads: int) -> FamilyRows:
    """The row counts of one scan under the common-rows policy."""
    names = spec.names
    formulas = [parse_formula(text) for text in spec.formulas]
    totals = one.totals
    reads_of = {name: set(formula.columns) for name, formula in zip(names, formulas, strict=True)}
    data_columns = set(one.design.data_columns)
    left_out = {
        name: {column: count for column, count in totals.dropped_by_column.items()
               if column in data_columns and column not in reads_of[name]}
        for name in names}
    rows = FamilyRows(rows_read=totals.rows_read, rows_used=totals.rows_used,
                      dropped_rows=totals.dropped_rows,
                      dropped_by_column=dict(totals.dropped_by_column),
                      unseen_levels={k: dict(v) for k, v in totals.unseen_levels.items()},
                      left_out_by_other_columns=left_out,
                      chunks_absorbed=one.state.chunks_absorbed, data_reads=reads)
    return rows


def evaluate_family(
    spec: FamilySpec,
    chunks: ChunkSource,
    *,
    design: Design | None = None,
    refinement_passes: int = 1,
    strict: bool = False,
) -> FamilyReport:
    """Refit every candidate from one read of the rows and compare them.

    The union of the candidates' columns goes through the engine once
    (:func:`~monitor.stats.fitting.pass_one`); each candidate's factor is derived
    from that one state; ``refinement_passes`` further reads refine every
    candidate's coefficients together (each read serves all candidates).

    Parameters
    ----------
    spec
        The family (see :func:`make_family_spec`).
    chunks
        A callable returning a fresh iterator of chunks (column name -> 1-D array).
    design
        A frozen encoding to reuse (a later night reuses the baseline's); it must
        have been built from the family's formulas in order.
    refinement_passes
        Reads that refine coefficients and residual sums of squares with
        accurately computed residuals (0 turns it off).
    strict
        Refuse rows that would be left out instead of counting them.

    Raises
    ------
    ConfigurationError
        Two candidates have the same design columns after encoding, or ``design``
        does not belong to this family.
    DataValidationError, ModelFitError
        No usable rows, too few rows for a candidate, unusable values with ``strict``.
    """
    reads = 0

    def counted() -> Iterable[Mapping[str, Any]]:
        nonlocal reads
        reads += 1
        return chunks()

    one, factors = prepare_candidates(spec, counted(), design=design, strict=strict,
                                      read_again=counted, all_chunks=chunks)
    if refinement_passes > 0:
        coefficients, ssr, steps = refine_factors(counted, one.design, factors,
                                                  max_passes=refinement_passes)
    else:
        coefficients = [f.coefficients for f in factors]
        ssr = [f.ssr for f in factors]
        steps = [0] * len(factors)
    fits = [result_of(one, m, factors[m], coefficients=coefficients[m], ssr=ssr[m],
                      refinement_steps=steps[m]) for m in range(len(factors))]
    rows = family_rows(spec, one, reads)
    return compare_fits(spec, fits, one.design.models, rows=rows)

