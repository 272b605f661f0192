"""GENERATED TEST DATA: a seeded, invented history of nightly runs for the report tests.

Nothing here is a real data set or a reference value.  :func:`build_history`
writes ``nights`` runs of an invented monitor through the public writer
(``HistoryStore.claim_slot`` / ``complete_run`` / ``fail_run``), shaped like the
rows a nightly run stores: long-form metrics per candidate (n, r_squared, aic,
delta, weight, ...), coefficients with confidence bounds, one verdict row per
segment with the family verdict as detail, check rows whose ``detail`` carries
the arrays the report draws, shaped like the real checks' details (see
``monitor/report/_evidence.py``), alerts from
the night the planted change shows up, a promotion and a note.

The story (invented): candidate ``"mid"`` is chosen; from night ``change_night``
on, candidate ``"full"`` fits better (its AIC drops), the ``temp`` coefficient
shifts, and the cusum check fails with its change estimate on that night.
"""

from __future__ import annotations

import datetime as dt
import math
from dataclasses import dataclass

import numpy as np

from storage.history import HistoryStore

START = dt.datetime(2025, 1, 6, tzinfo=dt.UTC)
HOSTILE = "<script>alert(1)</script>"
MODELS = {"lean": ("Intercept", "temp"), "mid": ("Intercept", "temp", "wind"),
          "full": ("Intercept", "temp", "wind", "temp:wind")}
CHECKS = ("jarque_bera", "breusch_pagan", "durbin_watson", "cusum", "psi", "cooks_distance",
          "forecast_error_ratio")


@dataclass(frozen=True)
class GeneratedHistory:
    """What was written, for tests to compare against."""

    monitor: str
    segments: tuple[str, ...]
    nights: tuple[dt.datetime, ...]       # completed nights, in order
    failed_night: dt.datetime
    change_night: dt.datetime
    models: dict[str, tuple[str, ...]]
    chosen: str


def build_history(store: HistoryStore, *, monitor: str = "district-east", nights: int = 24,
                  change_at: int = 15, segments: tuple[str, ...] = ("",),
                  hostile: bool = False, seed: int = 7) -> GeneratedHistory:
    """Write the invented history (see the module notes) and return its outline."""
    rng = np.random.default_rng(seed)
    models = {name: tuple(HOSTILE if (hostile and term == "wind") else term for term in terms)
              for name, terms in MODELS.items()}
    chosen = "mid"
    store.record_promotion(monitor, chosen, by="analyst (invented)", reason="initial choice",
                           now=START - dt.timedelta(days=3))
    store.add_annotation(monitor, START + dt.timedelta(days=5), START + dt.timedelta(days=7),
                         HOSTILE + " plant holiday" if hostile else "plant holiday (invented)",
                         by="analyst (invented)", now=START)
    slots = [START + dt.timedelta(days=i) for i in range(nights + 1)]
    failed_index = 3
    completed = []
    for index, slot in enumerate(slots):
        claim = store.claim_slot(monitor, slot, "generator:1", now=slot)
        assert claim is not None
        if index == failed_index:
            store.fail_run(claim, "source", "the source table was empty (invented failure)",
                           error_kind="source", now=slot)
            continue
        changed = index >= change_at
        rows = _night_rows(rng, models, chosen, slot, changed, segments, index, change_at,
                          hostile)
        store.complete_run(claim, {"window_start": slot - dt.timedelta(days=30),
                                   "window_end": slot, "rows_read": 720, "rows_dropped": 2},
                           now=slot, **rows)
        completed.append(slot)
    return GeneratedHistory(monitor, segments, tuple(completed), slots[failed_index],
                            slots[change_at], models, chosen)


def _night_rows(rng: np.random.Generator, models: dict[str, tuple[str, ...]], chosen: str,
                slot: dt.datetime, changed: bool, segments: tuple[str, ...], index: int,
                change_at: int, hostile: bool) -> dict[str, list[dict[str, object]]]:
    rows: dict[str, list[dict[str, object]]] = {"metrics": [], "coefficients": [], "checks": [],
                                                "verdicts": [], "alerts": []}
    for segment in segments:
        aic = {"lean": 1210.0 + rng.normal(0, 1.5), "mid": 1180.0 + rng.normal(0, 1.5),
               "full": 1183.0 + rng.normal(0, 1.5) - (14.0 if changed else 0.0)}
        best = min(aic, key=aic.__getitem__)
        delta = {m: aic[m] - aic[best] for m in aic}
        raw = {m: math.exp(-delta[m] / 2) for m in aic}
        weight = {m: raw[m] / sum(raw.values()) for m in aic}
        for model, terms in models.items():
            k = len(terms)
            r2 = 0.80 + 0.02 * k + rng.normal(0, 0.005)
            values = {"n": 718.0, "rank": float(k), "r_squared": r2,
                      "adj_r_squared": 1 - (1 - r2) * 717 / (718 - k), "aic": aic[model],
                      "bic": aic[model] + k * (math.log(718) - 2), "aicc": aic[model] + 0.05 * k,
                      "delta": delta[model], "weight": weight[model],
                      "sigma": 2.0 + rng.normal(0, 0.05), "f_pvalue": 1e-30,
                      "f_statistic": 400.0 + rng.normal(0, 5.0)}
            for metric, value in values.items():
                rows["metrics"].append({"model": model, "metric": metric, "value": value,
                                        "segment": segment})
            for position, term in enumerate(terms):
                base = (50.0, -2.0, 0.8, 0.05)[position]
                shift = -0.6 if (changed and position == 1) else 0.0
                estimate = base + shift + rng.normal(0, 0.03)
                error = 0.05 + 0.01 * position
                rows["coefficients"].append({
                    "model": model, "term": term, "estimate": estimate, "std_error": error,
                    "ci_lower": estimate - 1.96 * error, "ci_upper": estimate + 1.96 * error,
                    "ci_level": 0.95, "p_value": 1e-6, "segment": segment})
            for check in CHECKS:
                rows["checks"].append(_check_row(rng, check, model, segment, slot, changed,
                                                 index - change_at, hostile))
        rows["verdicts"].append({
            "criterion": "aic", "best_model": best, "chosen_model": chosen,
            "is_chosen_best": best == chosen, "margin": 2.0, "segment": segment,
            "detail": {"chosen": chosen, "best": best, "chosen_is_best": best == chosen,
                       "delta": delta[chosen], "chosen_within_margin": delta[chosen] <= 2.0,
                       "chosen_weight": weight[chosen],
                       "summary": (f"'{chosen}' is still the best of 3 candidates by AIC"
                                   if best == chosen else
                                   f"'{chosen}' trails '{best}' by ΔAIC = {delta[chosen]:.2f}")
                       + " (generated test data)."}})
        if changed:
            rows["alerts"].append({
                "model": chosen, "kind": "chosen_not_best", "severity": "warning",
                "message": f"'{best}' beats the chosen '{chosen}' by ΔAIC {delta[chosen]:.1f}",
                "evidence": {"best": best, "delta": delta[chosen], "nights": index - change_at + 1},
                "segment": segment})
        if changed and index >= change_at + 2:
            rows["alerts"].append({
                "model": chosen, "kind": "cusum", "severity": "critical",
                "message": "running sum of errors crossed its bound" + (
                    " " + HOSTILE if hostile else ""),
                "evidence": {"statistic": 2.4, "p_value": 1e-4, "bound": 1.358},
                "segment": segment})
    return rows


def _check_row(rng: np.random.Generator, check: str, model: str, segment: str,
               slot: dt.datetime, changed: bool, nights_since_change: int,
               hostile: bool) -> dict[str, object]:
    p_value = float(rng.uniform(0.2, 0.9))
    statistic = float(rng.uniform(0.5, 3.0))
    detail: dict[str, object] = {}
    if check == "jarque_bera":
        count = 120
        at = [slot - dt.timedelta(days=30) + dt.timedelta(hours=6 * i) for i in range(count)]
        fitted = rng.normal(40.0, 6.0, count)
        residual = rng.normal(0.0, 2.0, count) + (np.linspace(0, 3, count) if changed else 0.0)
        detail["sample"] = {"at": [a.isoformat() for a in at], "key": list(range(count)),
                            "fitted": fitted.tolist(), "residual": residual.tolist()}
        detail["forecast_errors"] = {"at": [a.isoformat() for a in at[::3]],
                                     "error": (residual[::3] + 0.5).tolist()}
    elif check == "cusum":
        # shaped like the real check: a thinned raw path S_k of the residuals, the change
        # estimate around it, and the statistic max|S_k| / sqrt(n sigma^2)
        count, scale = 60, 2.0 * math.sqrt(718)
        at = [slot - dt.timedelta(days=30) + dt.timedelta(hours=12 * i) for i in range(count)]
        steps = rng.normal(0, 0.12, count) + (np.r_[np.zeros(30), np.full(30, 0.1)]
                                              if changed else 0.0)
        scaled = np.cumsum(steps)
        largest = int(np.argmax(np.abs(scaled)))
        rows = [12 * i for i in range(count)]
        statistic = float(abs(scaled[largest]))
        change_at = 30 if changed else int(rng.integers(5, 55))
        detail.update(largest_at_row=rows[largest], largest_at_key=at[largest].isoformat(),
                      critical_values={"1%": 1.63, "5%": 1.36, "10%": 1.22},
                      change={"row": rows[change_at], "key": at[change_at].isoformat(),
                              "statistic": 1.0, "path_rows": rows,
                              "path_values": (scaled * scale).tolist(),
                              "path_keys": [a.isoformat() for a in at]})
        if changed:
            p_value = 1e-4 / (1 + nights_since_change)
    elif check == "psi":
        edges = np.linspace(-3.2, 3.2, 9)  # interior edges of 10 bins, as the real check
        base = np.full(10, 0.1)
        fresh = np.array([0.02, 0.04, 0.06, 0.08, 0.1, 0.12, 0.14, 0.16, 0.14, 0.14]) \
            if changed else base + rng.normal(0, 0.005, 10)
        detail.update(bins=10, edges=edges.tolist(), baseline_shares=base.tolist(),
                      fresh_shares=fresh.tolist())
        p_value = None if not changed else 0.003
    elif check == "cooks_distance":
        detail["top_rows"] = [{"key": HOSTILE if (hostile and i == 2) else f"row-{i}",
                               "cooks_distance": 0.2 / (i + 1)} for i in range(6)]
        detail["cut_offs"] = {"cooks_4_over_n": 4 / 718, "cooks_f_median": 0.84,
                              "cooks_1": 1.0, "leverage_2p_over_n": 6 / 718}
        p_value = None
    verdict = "pass"
    if p_value is not None and p_value < 0.01:
        verdict = "fail"
    elif p_value is not None and p_value < 0.05:
        verdict = "warn"
    return {"model": model, "check": check, "verdict": verdict, "statistic": statistic,
            "p_value": p_value, "is_exact": check != "jarque_bera",
            "sample_size": None if check != "jarque_bera" else 120, "rows": 718,
            "detail": detail, "segment": segment}
