#!/usr/bin/env python3
"""Writes tests/reference/fixtures/split-stats.json: A/B split readouts computed with scipy.

Run with the venv made by setup-venv.sh:

    tests/reference/setup-venv.sh && tests/reference/.venv/bin/python tests/reference/stats_reference.py

The Rust readout (server/src/splits/stats.rs) is checked against this file by
server/tests/split_stats_reference.rs. The data are invented (Ridgeline Cycle Works, the bicycle
repair chain of the other fixtures): satisfaction scores 1-5 and repair minutes per adapter arm, and
yes/no "booking completed" outcomes. Every draw comes from a seeded numpy Generator, so a rerun on
the same library versions writes the same file.

What each number is (the arm a comparison names is arm_i, the first arm of its case is arm_0):

- numeric arm: n, mean, sample standard deviation (ddof 1), 95% interval of the mean
  mean +- t.ppf(0.975, n - 1) * sd / sqrt(n), checked against scipy.stats.t.interval.
- numeric comparison: scipy.stats.ttest_ind(arm_i, arm_0, equal_var=False): its statistic, pvalue,
  df (Welch-Satterthwaite) and confidence_interval(0.95) of mean(arm_i) - mean(arm_0); checked
  against the same numbers written out by hand with scipy.stats.t.
- yes/no arm: n, successes, proportion, 95% Wilson score interval (no continuity correction) from
  scipy.stats.binomtest(k, n).proportion_ci(method="wilson"), checked against the closed form.
- yes/no comparison: difference p_i - p_0, its unpooled normal interval
  d +- norm.ppf(0.975) * sqrt(p_i (1 - p_i) / n_i + p_0 (1 - p_0) / n_0), and the two-proportion
  z-test with the pooled standard error: z = d / sqrt(p (1 - p) (1 / n_i + 1 / n_0)),
  p-value 2 * norm.sf(|z|).

A quantity that is undefined for its data (fewer than two values, or a standard error of zero) is
written as null, and the Rust side returns None for it. scipy itself answers those cases with nan,
or with t = inf, p = 0 and a placeholder df = 1 when both arms are constant with different means.
"""

from __future__ import annotations

import json
import math
import sys
import warnings
from pathlib import Path

import numpy as np
import scipy
from scipy import stats

CONFIDENCE = 0.95
OUT = Path(__file__).resolve().parent / "fixtures" / "split-stats.json"


def scores(rng: np.random.Generator, n: int, weights: list[float]) -> list[float]:
    """n satisfaction scores 1..5 drawn with the given relative weights."""
    p = np.asarray(weights, dtype=float)
    return [float(x) for x in rng.choice([1, 2, 3, 4, 5], size=n, p=p / p.sum())]


def minutes(rng: np.random.Generator, n: int, mean: float, sd: float) -> list[float]:
    """n repair durations in minutes, normal, rounded to a tenth, at least 5."""
    return [max(5.0, round(float(x), 1)) for x in rng.normal(mean, sd, size=n)]


def close(a: float, b: float, what: str) -> None:
    if not math.isclose(a, b, rel_tol=1e-12, abs_tol=1e-15):
        sys.exit(f"stats_reference: {what}: {a!r} and {b!r} disagree")


def numeric_arm(name: str, values: list[float]) -> dict:
    x = np.asarray(values)
    n = len(x)
    mean = float(x.mean()) if n else None
    sd = float(x.std(ddof=1)) if n >= 2 else None
    interval = None
    if n >= 2 and sd > 0:
        half = stats.t.ppf(0.5 + CONFIDENCE / 2, n - 1) * sd / math.sqrt(n)
        interval = [mean - half, mean + half]
        lo, hi = stats.t.interval(CONFIDENCE, n - 1, loc=mean, scale=sd / math.sqrt(n))
        close(interval[0], lo, f"{name} interval low")
        close(interval[1], hi, f"{name} interval high")
    return {
        "name": name,
        "values": values,
        "n": n,
        "mean": mean,
        "std_dev": sd,
        "mean_interval": interval,
    }


def welch(name: str, arm: list[float], first: list[float]) -> dict:
    a, b = np.asarray(arm), np.asarray(first)
    out = {
        "arm": name,
        "difference": float(a.mean() - b.mean()),
        "interval": None,
        "t_statistic": None,
        "degrees_of_freedom": None,
        "p_value": None,
    }
    if len(a) < 2 or len(b) < 2:
        return out
    va, vb = a.var(ddof=1) / len(a), b.var(ddof=1) / len(b)
    se = math.sqrt(va + vb)
    if se == 0:
        # Both arms constant. scipy answers t = ±inf, p = 0 and df = 1 (a placeholder) or nan
        # when the means are equal; the readout calls all of it undefined.
        return out
    with warnings.catch_warnings():
        # A constant arm makes scipy warn about precision loss in its moment calculation; the
        # hand-written check below confirms the numbers.
        warnings.simplefilter("ignore", RuntimeWarning)
        res = stats.ttest_ind(a, b, equal_var=False)
    ci = res.confidence_interval(confidence_level=CONFIDENCE)
    out["t_statistic"] = float(res.statistic)
    out["degrees_of_freedom"] = float(res.df)
    out["p_value"] = float(res.pvalue)
    out["interval"] = [float(ci.low), float(ci.high)]
    # The same numbers by hand, so the fixture does not rest on one scipy code path.
    df = (va + vb) ** 2 / (va**2 / (len(a) - 1) + vb**2 / (len(b) - 1))
    t = out["difference"] / se
    close(t, out["t_statistic"], f"{name} t")
    close(df, out["degrees_of_freedom"], f"{name} df")
    close(2 * stats.t.sf(abs(t), df), out["p_value"], f"{name} p")
    half = stats.t.ppf(0.5 + CONFIDENCE / 2, df) * se
    close(out["difference"] - half, out["interval"][0], f"{name} interval low")
    close(out["difference"] + half, out["interval"][1], f"{name} interval high")
    return out


def binary_arm(name: str, n: int, successes: int) -> dict:
    interval = None
    if n > 0:
        ci = stats.binomtest(successes, n).proportion_ci(CONFIDENCE, method="wilson")
        interval = [float(ci.low), float(ci.high)]
        z = stats.norm.ppf(0.5 + CONFIDENCE / 2)
        p = successes / n
        centre = (p + z * z / (2 * n)) / (1 + z * z / n)
        half = z / (1 + z * z / n) * math.sqrt(p * (1 - p) / n + z * z / (4 * n * n))
        close(max(0.0, centre - half), interval[0], f"{name} wilson low")
        close(min(1.0, centre + half), interval[1], f"{name} wilson high")
    return {
        "name": name,
        "n": n,
        "successes": successes,
        "proportion": successes / n if n else None,
        "wilson_interval": interval,
    }


def two_proportions(name: str, arm: tuple[int, int], first: tuple[int, int]) -> dict:
    (n1, k1), (n0, k0) = arm, first
    p1, p0 = k1 / n1, k0 / n0
    d = p1 - p0
    z_crit = stats.norm.ppf(0.5 + CONFIDENCE / 2)
    se_unpooled = math.sqrt(p1 * (1 - p1) / n1 + p0 * (1 - p0) / n0)
    pooled = (k1 + k0) / (n1 + n0)
    se_pooled = math.sqrt(pooled * (1 - pooled) * (1 / n1 + 1 / n0))
    z = d / se_pooled if se_pooled > 0 else None
    return {
        "arm": name,
        "difference": d,
        "interval": [d - z_crit * se_unpooled, d + z_crit * se_unpooled] if se_unpooled > 0 else None,
        "z_statistic": z,
        "p_value": float(2 * stats.norm.sf(abs(z))) if z is not None else None,
    }


def numeric_case(name: str, description: str, arms: list[tuple[str, list[float]]]) -> dict:
    first = arms[0][1]
    return {
        "name": name,
        "description": description,
        "arms": [numeric_arm(arm, values) for arm, values in arms],
        "comparisons": [welch(arm, values, first) for arm, values in arms[1:]],
    }


def binary_case(name: str, description: str, arms: list[tuple[str, int, int]]) -> dict:
    first = (arms[0][1], arms[0][2])
    return {
        "name": name,
        "description": description,
        "arms": [binary_arm(arm, n, k) for arm, n, k in arms],
        "comparisons": [two_proportions(arm, (n, k), first) for arm, n, k in arms[1:]],
    }


def main() -> None:
    rng = np.random.default_rng(20240611)
    numeric = [
        numeric_case(
            "satisfaction-two-arms",
            "post-repair satisfaction 1-5, incumbent adapter against a candidate, equal sizes",
            [
                ("incumbent", scores(rng, 40, [2, 4, 10, 14, 10])),
                ("candidate", scores(rng, 40, [1, 3, 8, 15, 13])),
            ],
        ),
        numeric_case(
            "satisfaction-three-arms-unequal",
            "three arms of very different sizes and spreads; the small arm is polarised",
            [
                ("incumbent", scores(rng, 25, [1, 2, 8, 9, 5])),
                ("terse-replies", scores(rng, 61, [0, 1, 6, 20, 12])),
                ("chatty-replies", scores(rng, 9, [4, 0, 1, 0, 4])),
            ],
        ),
        numeric_case(
            "satisfaction-clear-winner",
            "large arms with a large difference: a p-value far below 1e-12",
            [
                ("incumbent", scores(rng, 220, [10, 20, 30, 25, 15])),
                ("candidate", scores(rng, 180, [1, 2, 8, 30, 60])),
            ],
        ),
        numeric_case(
            "repair-minutes-unequal-variance",
            "repair minutes quoted by each arm: different sizes and standard deviations",
            [
                ("incumbent", minutes(rng, 33, 74.0, 9.0)),
                ("candidate", minutes(rng, 140, 71.5, 26.0)),
            ],
        ),
        numeric_case(
            "candidate-all-fives",
            "every candidate answer scored 5 (zero variance): Welch df falls to n0 - 1",
            [
                ("incumbent", scores(rng, 15, [1, 1, 4, 5, 4])),
                ("candidate", [5.0] * 12),
            ],
        ),
        numeric_case(
            "both-constant",
            "both arms constant: standard errors are zero, so the test is undefined",
            [
                ("incumbent", [4.0] * 6),
                ("candidate", [5.0] * 7),
            ],
        ),
        numeric_case(
            "extreme-at-the-bound",
            "the report that took every split down (1 and 2 against 1e200 and 3), with 1e200 "
            "moved to the accepted bound 1e15: squared deviations near 1e30",
            [
                ("incumbent", [1.0, 2.0]),
                ("candidate", [1e15, 3.0]),
            ],
        ),
        numeric_case(
            "extreme-spanning-the-range",
            "arms spanning -1e15..1e15 against a small-spread arm: standard errors 1e-1 and 1e15",
            [
                ("incumbent", [1.0, 2.0, 3.0, 2.5]),
                ("wide", [-1e15, 1e15, 0.0, 1e15]),
                ("wide-negative", [-1e15, -1e15, -0.5e15]),
            ],
        ),
        # Not here: values near 1e15 that differ by eighths. numpy's mean rounds their sum to the
        # f64 grid at 6e15 (spacing 1), so scipy's standard deviation is off by 1e-3 relative;
        # server/src/splits/stats.rs checks that case against exact arithmetic instead.
        numeric_case(
            "many-outcomes-thousands",
            "1,500 outcomes per arm: Welch df near 3,000, where the t quantile comes from the "
            "Cornish-Fisher series",
            [
                ("incumbent", scores(rng, 1500, [2, 4, 10, 14, 10])),
                ("candidate", scores(rng, 1500, [2, 4, 9, 14, 11])),
            ],
        ),
        numeric_case(
            "many-outcomes-above-ten-thousand-df",
            "6,000 outcomes per arm: Welch df near 12,000, where the t tail comes from Hill's "
            "transformation as well",
            [
                ("incumbent", scores(rng, 6000, [2, 4, 10, 14, 10])),
                ("candidate", scores(rng, 6000, [2, 4, 9, 14, 11])),
            ],
        ),
    ]
    binary = [
        binary_case(
            "booking-two-arms",
            "booking completed after the assistant's reply, incumbent against a candidate",
            [("incumbent", 180, 112), ("candidate", 210, 149)],
        ),
        binary_case(
            "booking-three-arms-unequal",
            "three arms with 500, 120 and 75 conversations",
            [("incumbent", 500, 301), ("short-quotes", 120, 81), ("upsell", 75, 38)],
        ),
        binary_case(
            "booking-candidate-all-yes",
            "every candidate conversation booked: Wilson stays inside (0, 1)",
            [("incumbent", 25, 15), ("candidate", 20, 20)],
        ),
        binary_case(
            "booking-large-arms",
            "5,000 conversations per arm, 30% against 36%: a p-value near 1e-10",
            [("incumbent", 5000, 1500), ("candidate", 5000, 1800)],
        ),
        binary_case(
            "booking-all-yes-against-all-no",
            "unpooled standard error zero (no interval), pooled one positive (a test)",
            [("incumbent", 12, 0), ("candidate", 9, 9)],
        ),
        binary_case(
            "booking-both-all-yes",
            "both arms all yes: both standard errors are zero",
            [("incumbent", 30, 30), ("candidate", 14, 14)],
        ),
        binary_case(
            "huge-counts",
            "1e15 conversations per arm, 40% against 40.00001%: counts far beyond any sample",
            [("incumbent", 10**15, 4 * 10**14), ("candidate", 10**15, 4 * 10**14 + 10**8)],
        ),
        binary_case(
            "huge-against-tiny",
            "1e12 conversations against 3",
            [("incumbent", 10**12, 3 * 10**11), ("candidate", 3, 2)],
        ),
    ]
    doc = {
        "generated_by": {
            "script": "tests/reference/stats_reference.py",
            "python": sys.version.split()[0],
            "numpy": np.__version__,
            "scipy": scipy.__version__,
        },
        "confidence_level": CONFIDENCE,
        "numeric": numeric,
        "binary": binary,
    }
    OUT.write_text(json.dumps(doc, indent=1) + "\n")
    print(f"stats_reference: wrote {OUT}")


if __name__ == "__main__":
    main()
