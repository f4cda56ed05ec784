#!/usr/bin/env python3
"""Writes tests/reference/fixtures/split-sequential.json: always-valid split comparisons computed
with confseq, and assignment checks computed with scipy.

Run with the venv made by setup-venv.sh:

    tests/reference/setup-venv.sh && tests/reference/.venv/bin/python tests/reference/sequential.py

The Rust side (server/src/splits/sequential.rs and ratio_check.rs) is checked against this file
by server/tests/split_sequential_reference.rs. Every draw comes from a seeded numpy Generator.

Always-valid comparisons. switchyard's readout uses the normal-mixture sequential probability
ratio test (Johari, Pekelis & Walsh 2017) on the normal approximation of a difference estimate:
with d the difference of arm_i to arm_0, se its unpooled standard error, z = d / se, the
effective count m = n_i n_0 / (n_i + n_0) and mixing variance tau2 (in units of one outcome's
variance), the mixture is the two-sided normal mixture of Howard, Ramdas, McAuliffe & Sekhon
(2021) for the process S = z sqrt(m) at intrinsic time V = m with rho = 1 / tau2. confseq names
its mixtures by the time v_opt at which the boundary is tightest and derives
rho = v_opt / (2 ln(1/alpha_opt) + ln(1 + 2 ln(1/alpha_opt))); this script inverts that to pass
the v_opt whose rho is 1 / tau2. From confseq.boundaries:

- p_value = min(1, exp(-normal_log_mixture(S, V, v_opt, alpha_opt, is_one_sided=False)));
- interval = d +- se * normal_mixture_bound(V, 0.05, v_opt, alpha_opt, is_one_sided=False) / sqrt(m).

The script also writes both out in closed form and stops if they differ from confseq's by more
than 1e-12 relative. The streams: numeric outcomes (satisfaction-like scores and normal values
with and without a true difference), each arm's values listed so that the Rust side can build
its tallies the way the server does, and yes/no outcomes as counts at each checkpoint. A
checkpoint with fewer than 10 outcomes in an arm (MIN_OUTCOMES_PER_ARM) has null figures.

Assignment checks: scipy.stats.chisquare(requests, expected) over the arms of positive weight,
expected = share * total with share = weight / sum(weights) and total the requests of those arms
(an arm of weight 0 is left out with its requests).
"""

from __future__ import annotations

import json
import math
import re
import sys
from pathlib import Path

import confseq
import numpy as np
import scipy
from confseq import boundaries
from scipy import stats

ALPHA = 0.05
ALPHA_OPT = 0.05
MIN_OUTCOMES_PER_ARM = 10
OUT = Path(__file__).resolve().parent / "fixtures" / "split-sequential.json"


def close(a: float, b: float, what: str) -> None:
    if not math.isclose(a, b, rel_tol=1e-12, abs_tol=1e-300):
        sys.exit(f"sequential: {what}: {a!r} and {b!r} disagree")


def v_opt_for(tau2: float) -> float:
    """The v_opt for which confseq's best_rho(v_opt, ALPHA_OPT) is 1 / tau2."""
    l = math.log(1 / ALPHA_OPT)
    return (1 / tau2) * (2 * l + math.log(1 + 2 * l))


def figures(d: float, var: float, n1: int, n0: int, tau2: float, what: str) -> dict:
    m = n1 * n0 / (n1 + n0)
    out = {"difference": d, "effective_count": m, "p_value": None, "interval": None}
    if n1 < MIN_OUTCOMES_PER_ARM or n0 < MIN_OUTCOMES_PER_ARM or not var > 0:
        return out
    se = math.sqrt(var)
    z = d / se
    v_opt = v_opt_for(tau2)
    log_m = float(boundaries.normal_log_mixture(z * math.sqrt(m), m, v_opt, ALPHA_OPT, False))
    bound = float(boundaries.normal_mixture_bound(m, ALPHA, v_opt, ALPHA_OPT, False))
    p = min(1.0, math.exp(-log_m))
    half = se * bound / math.sqrt(m)
    # The same in closed form (g = tau2 m).
    g = tau2 * m
    close(log_m, -0.5 * math.log1p(g) + g / (1 + g) * z * z / 2, f"{what} log mixture")
    close(half, se * math.sqrt((1 + g) / g * (math.log1p(g) + 2 * math.log(1 / ALPHA))), f"{what} half")
    out["p_value"] = p
    out["interval"] = [d - half, d + half]
    return out


def numeric_case(name, description, rng_seed, arm0, arm1, checkpoints, tau2):
    """arm0, arm1: functions of a Generator and a count giving that many values."""
    rng = np.random.default_rng(rng_seed)
    n_max = max(checkpoints)
    a0 = [float(x) for x in arm0(rng, n_max[1])]
    a1 = [float(x) for x in arm1(rng, n_max[0])]
    points = []
    for n1, n0 in checkpoints:
        x1, x0 = np.asarray(a1[:n1]), np.asarray(a0[:n0])
        d = float(x1.mean() - x0.mean())
        var = float(x1.var(ddof=1) / n1 + x0.var(ddof=1) / n0) if min(n1, n0) >= 2 else 0.0
        f = figures(d, var, n1, n0, tau2, f"{name} at {n1},{n0}")
        f.update({"n_arm": n1, "n_first": n0})
        points.append(f)
    return {
        "name": name,
        "description": description,
        "mixing_variance": tau2,
        "first": a0,
        "arm": a1,
        "checkpoints": points,
    }


def binary_case(name, description, rng_seed, p0, p1, checkpoints, tau2):
    rng = np.random.default_rng(rng_seed)
    n_max = max(max(c) for c in checkpoints)
    y0 = rng.random(n_max) < p0
    y1 = rng.random(n_max) < p1
    points = []
    for n1, n0 in checkpoints:
        k1, k0 = int(y1[:n1].sum()), int(y0[:n0].sum())
        q1, q0 = k1 / n1, k0 / n0
        var = q1 * (1 - q1) / n1 + q0 * (1 - q0) / n0
        f = figures(q1 - q0, var, n1, n0, tau2, f"{name} at {n1},{n0}")
        f.update({"n_arm": n1, "successes_arm": k1, "n_first": n0, "successes_first": k0})
        points.append(f)
    return {"name": name, "description": description, "mixing_variance": tau2, "checkpoints": points}


def assignment_case(name, requests, weights):
    wsum = sum(weights)
    shares = [w / wsum for w in weights]
    keep = [i for i, w in enumerate(weights) if w > 0]
    total = sum(requests[i] for i in keep)
    obs = [requests[i] for i in keep]
    exp = [shares[i] * total for i in keep]
    res = stats.chisquare(obs, exp)
    return {
        "name": name,
        "requests": requests,
        "weights": weights,
        "expected_shares": shares,
        "chi_square": float(res.statistic),
        "degrees_of_freedom": len(keep) - 1,
        "p_value": float(res.pvalue),
    }


def scores(weights):
    p = np.asarray(weights, dtype=float)
    return lambda rng, n: rng.choice([1, 2, 3, 4, 5], size=n, p=p / p.sum())


def normal(mean, sd):
    return lambda rng, n: np.round(rng.normal(mean, sd, size=n), 3)


def main() -> None:
    even = [(n, n) for n in (5, 10, 11, 20, 50, 100, 200, 500, 1000, 2000)]
    uneven = [(n // 4, n) for n in (40, 100, 400, 1000, 2000)]
    numeric = [
        numeric_case("scores-same", "A/A: satisfaction scores 1-5, same weights in both arms",
                     1801, scores([1, 2, 4, 6, 3]), scores([1, 2, 4, 6, 3]), even, 0.1),
        numeric_case("scores-better", "arm's scores lean higher",
                     1802, scores([1, 2, 4, 6, 3]), scores([1, 1, 3, 6, 6]), even, 0.1),
        numeric_case("minutes-uneven", "repair minutes, arm a quarter the size, 2 minutes faster",
                     1803, normal(48.0, 9.0), normal(46.0, 7.0), uneven, 0.1),
        numeric_case("normal-small-tau", "A/A normal values, mixing variance 0.01",
                     1804, normal(0.0, 1.0), normal(0.0, 1.0), even, 0.01),
        numeric_case("normal-large-tau", "0.3 sd apart, mixing variance 2",
                     1805, normal(0.0, 1.0), normal(0.3, 1.0), even, 2.0),
    ]
    big = [(n, n) for n in (10, 100, 1000, 10_000, 100_000)]
    binary = [
        binary_case("booking-same", "A/A: 30% yes in both arms", 1811, 0.3, 0.3, big, 0.1),
        binary_case("booking-better", "25% against 30% yes", 1812, 0.25, 0.30, big, 0.1),
        binary_case("rare-yes", "2% against 2.5% yes, arm half the size",
                    1813, 0.02, 0.025, [(n // 2, n) for n in (20, 200, 2000, 20_000, 200_000)], 0.1),
        binary_case("booking-tau-1", "40% against 45% yes, mixing variance 1",
                    1814, 0.40, 0.45, big, 1.0),
    ]
    assignment = [
        assignment_case("even-pass", [502, 498], [1.0, 1.0]),
        assignment_case("even-near", [5000, 4700], [0.5, 0.5]),
        assignment_case("even-mismatch", [5000, 4600], [0.5, 0.5]),
        assignment_case("three-arms-weighted", [7012, 2011, 977], [7.0, 2.0, 1.0]),
        assignment_case("three-arms-off", [6800, 2150, 1050], [0.7, 0.2, 0.1]),
        assignment_case("zero-weight-arm-empty", [40, 0, 38], [1.0, 0.0, 1.0]),
        assignment_case("zero-weight-arm-rolled-back", [400, 2000, 520], [1.0, 0.0, 1.0]),
        assignment_case("far-tail", [51_000, 49_000], [1.0, 1.0]),
        assignment_case("underflow", [60_000, 40_000], [1.0, 1.0]),
        assignment_case("five-arms", [210, 190, 205, 395, 0], [1.0, 1.0, 1.0, 2.0, 0.0]),
    ]
    doc = {
        "generated_by": {
            "script": "tests/reference/sequential.py",
            "python": sys.version.split()[0],
            "numpy": np.__version__,
            "scipy": scipy.__version__,
            "confseq": getattr(confseq, "__version__", "0.0.11"),
        },
        "alpha": ALPHA,
        "alpha_opt": ALPHA_OPT,
        "min_outcomes_per_arm": MIN_OUTCOMES_PER_ARM,
        "numeric": numeric,
        "binary": binary,
        "assignment": assignment,
    }
    text = json.dumps(doc, indent=1)
    # Lists of plain numbers on one line each, so the file stays short enough to read.
    text = re.sub(r"\[\s*(-?[0-9][^\[\]{}]*?)\s*\]", lambda m: "[" + re.sub(r"\s+", " ", m.group(1)) + "]", text)
    OUT.write_text(text + "\n")
    print(f"wrote {OUT}")


if __name__ == "__main__":
    main()
