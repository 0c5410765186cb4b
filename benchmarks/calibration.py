"""Is P(fail within H days) calibrated? The held-out check of `triage fit`, over many fleets.

Two kinds of fleet, each over many seeds:

* ``demo``: the invented demo fleet (1,200 drives x 120 nights, ``triage.demo``), fitted with
  ``FleetRiskModel.fit`` exactly as ``triage fit`` does: the model is refitted on the data before
  ``cut = end - H`` and scores the drives in service at the cut; observed = their failures in the
  next H days. Nobody knows the demo's per-drive probabilities, so this is predicted against
  observed.
* ``known``: a simulated fleet whose hazards are known: Weibull age hazard per model, pending
  sectors that appear at random times during the window and multiply the hazard by 4 from then on
  (a covariate that changes *during* the horizon, the case the old fixed-covariate forecast got
  wrong). Here the predicted probabilities are also compared with the true ones.

Acceptance (issue "prove the predictions"): total predicted within +-15 % of observed, and each
decile's predicted count inside the observed count's exact Poisson 95 % range in at least 8 of 10
deciles. Deciles are taken within each fleet and summed over seeds; concordance (Harrell's C on
the held-out window, lifelines) is the mean over seeds.

    .venv/bin/python benchmarks/calibration.py [--seeds 100] [--known-seeds 40] [--out benchmarks/out]
"""

from __future__ import annotations

import argparse
import json
import sys
import time
from pathlib import Path

import numpy as np
import pandas as pd
from scipy.stats import chi2

from triage.demo import FleetSpec, generate_fleet
from triage.demo.truth import ground_truth
from triage.survival.model import FleetRiskModel

HORIZON = 30


def poisson_range(k: int) -> tuple[float, float]:
    """Exact (Garwood) 95 % range of a Poisson mean given k observed events."""
    low = chi2.ppf(0.025, 2 * k) / 2 if k else 0.0
    return low, chi2.ppf(0.975, 2 * k + 2) / 2


# -- fleets -----------------------------------------------------------------------------------

def demo_fleet(seed: int):
    truth = ground_truth(generate_fleet(FleetSpec(seed=seed)))
    return truth.snapshots, truth.removals, None


KNOWN_MODELS = (("QH-HD8T-A", 1.3, 300_000.0), ("Tallow 14T", 0.8, 2_000_000.0), ("Marrow 4T", 2.2, 70_000.0))
PENDING_HR = 4.0
START = pd.Timestamp("2026-01-05T02:00:00Z")


def known_fleet(seed: int, n_drives: int = 3000, days: int = 120):
    """Weibull(shape, scale) per model; pending sectors start at a random night for 10 % of drives
    and multiply the hazard by PENDING_HR from then on. Failure ages by inverting the cumulative
    hazard night by night. Returns (snapshots, removals, truth) with truth = (serial, night, p)
    where p is the true P(fail within HORIZON days | alive at that night's state) for the
    drives in service at the held-out cut."""
    rng = np.random.default_rng(seed)
    model_index = rng.integers(0, len(KNOWN_MODELS), size=n_drives)
    shape = np.array([m[1] for m in KNOWN_MODELS])[model_index]
    scale = np.array([m[2] for m in KNOWN_MODELS])[model_index]
    age0 = rng.uniform(0, 5 * 8766, size=n_drives)
    onset = np.where(rng.uniform(size=n_drives) < 0.10, rng.integers(0, days, size=n_drives), 10**9)
    alive = np.ones(n_drives, dtype=bool)
    fail_night = np.full(n_drives, -1)
    target = -np.log(rng.uniform(size=n_drives))  # each drive fails when its hazard since day 0 reaches this
    spent = np.zeros(n_drives)
    rows = []
    for night in range(days):
        age = age0 + 24.0 * night
        pending = night >= onset
        hr = np.where(pending, PENDING_HR, 1.0)
        step = (((age + 24) / scale) ** shape - (age / scale) ** shape) * hr
        live = np.flatnonzero(alive)
        rows.append(pd.DataFrame({"serial": [f"QK{seed:03d}{i:05d}" for i in live], "night": night,
                                  "power_on_hours": age[live].astype(np.int64),
                                  "pending_sectors": np.where(pending[live], 8, 0).astype(float),
                                  "model_index": model_index[live]}))
        spent += np.where(alive, step, 0.0)
        dies = alive & (spent >= target)
        fail_night[dies] = night
        alive &= ~dies
    frame = pd.concat(rows, ignore_index=True)
    frame["taken_at"] = START + pd.to_timedelta(frame["night"], unit="D")
    frame["model"] = np.array([m[0] for m in KNOWN_MODELS])[frame["model_index"]]
    for column, value in (("firmware", "K1"), ("bus", "ata"), ("user_capacity_bytes", 8_000_000_000_000),
                          ("temperature_c", 35.0)):
        frame[column] = value
    failed = np.flatnonzero(fail_night >= 0)
    removals = pd.DataFrame({"serial": [f"QK{seed:03d}{i:05d}" for i in failed],
                             "removed_at": START + pd.to_timedelta(fail_night[failed] + 0.9, unit="D"),
                             "reason": "failed"})
    truth = {"age0": age0, "shape": shape, "scale": scale, "onset": onset, "serials":
             np.array([f"QK{seed:03d}{i:05d}" for i in range(n_drives)])}
    return frame.drop(columns=["night", "model_index"]), removals, truth


def true_probability(truth: dict, serials: np.ndarray, cut_night: int) -> np.ndarray:
    """P(fail within HORIZON days after the cut | alive then), pending onset by its known night."""
    index = pd.Index(truth["serials"]).get_indexer(serials)
    age0, shape, scale, onset = (truth[k][index] for k in ("age0", "shape", "scale", "onset"))
    total = np.zeros(len(index))
    for night in range(cut_night, cut_night + HORIZON):
        age = age0 + 24.0 * night
        hr = np.where(night >= onset, PENDING_HR, 1.0)
        total += (((age + 24) / scale) ** shape - (age / scale) ** shape) * hr
    return 1 - np.exp(-total)


# -- one fleet --------------------------------------------------------------------------------

def held_out(snapshots: pd.DataFrame, removals: pd.DataFrame):
    """(predicted per drive, failed per drive, concordance, serials) of FleetRiskModel's check."""
    model = FleetRiskModel(horizon_days=HORIZON)
    captured = {}
    original = model._evaluate_holdout

    def capture(states, removals_, cut, data_end):  # keep the per-drive arrays, not just the table
        from triage.survival.landmark import window_outcomes
        original(states, removals_, cut, data_end)
        test = states[states["landmark"] == cut]
        captured["serials"] = test["serial"].to_numpy()
        captured["cut"] = cut
        captured["outcome"] = window_outcomes(test, removals_, HORIZON, data_end)

    model._evaluate_holdout = capture
    model.fit(snapshots, removals)
    if model.holdout_ is None:
        return None
    calibration = model.calibration_
    return model, calibration, captured


def deciles(predicted: np.ndarray, failed: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    ranks = pd.Series(predicted).rank(method="first").to_numpy()
    decile = np.ceil(ranks / len(predicted) * 10).astype(int) - 1
    p, o = np.zeros(10), np.zeros(10)
    np.add.at(p, decile, predicted)
    np.add.at(o, decile, failed)
    return p, o


def run(kind: str, seeds: range) -> dict:
    totals_p, totals_o = np.zeros(10), np.zeros(10)
    concordance, truth_pairs, per_seed = [], [], []
    started = time.perf_counter()
    for seed in seeds:
        snapshots, removals, truth = demo_fleet(seed) if kind == "demo" else known_fleet(seed)
        result = held_out(snapshots, removals)
        if result is None:
            continue
        model, calibration, captured = result
        p = calibration["predicted_failures"].to_numpy()
        o = calibration["observed_failures"].to_numpy()
        totals_p[: len(p)] += p
        totals_o[: len(o)] += o
        concordance.append(model.holdout_["concordance"])
        per_seed.append((seed, float(p.sum()), int(o.sum())))
        if truth is not None:
            cut_night = int((captured["cut"] - START.normalize()) / pd.Timedelta(days=1))
            true_p = true_probability(truth, captured["serials"], cut_night)
            truth_pairs.append(float(true_p.sum()))
        print(f"{kind} seed {seed}: predicted {p.sum():.1f}, observed {o.sum():.0f}, "
              f"concordance {model.holdout_['concordance']:.3f}", file=sys.stderr, flush=True)
    inside = [poisson_range(int(ob))[0] <= pr <= poisson_range(int(ob))[1] for pr, ob in zip(totals_p, totals_o)]
    report = {
        "kind": kind, "seeds": len(per_seed), "horizon_days": HORIZON,
        "predicted_total": float(totals_p.sum()), "observed_total": float(totals_o.sum()),
        "ratio": float(totals_p.sum() / max(totals_o.sum(), 1)),
        "deciles_predicted": [round(float(v), 1) for v in totals_p],
        "deciles_observed": [int(v) for v in totals_o],
        "deciles_inside_poisson_95": int(sum(inside)),
        "concordance_mean": float(np.nanmean(concordance)) if concordance else None,
        "seconds": round(time.perf_counter() - started, 1),
    }
    if truth_pairs:
        report["true_expected_total"] = float(sum(truth_pairs))
    report["accepted"] = bool(abs(report["ratio"] - 1) <= 0.15 and report["deciles_inside_poisson_95"] >= 8)
    return report


def main(argv=None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--seeds", type=int, default=100, help="demo fleets")
    parser.add_argument("--known-seeds", type=int, default=40, help="simulated fleets with known hazards")
    parser.add_argument("--out", type=Path, default=Path("benchmarks/out"))
    args = parser.parse_args(argv)
    reports = [run("known", range(1000, 1000 + args.known_seeds)), run("demo", range(args.seeds))]
    args.out.mkdir(parents=True, exist_ok=True)
    (args.out / "calibration.json").write_text(json.dumps(reports, indent=2) + "\n")
    for r in reports:
        print(f"{r['kind']}: {r['seeds']} fleets, predicted {r['predicted_total']:.1f} vs observed "
              f"{r['observed_total']:.0f} (ratio {r['ratio']:.3f})"
              + (f", true expected {r['true_expected_total']:.1f}" if "true_expected_total" in r else "")
              + f"; deciles inside Poisson 95 %: {r['deciles_inside_poisson_95']}/10; "
              f"concordance {r['concordance_mean']:.3f}; {'ACCEPTED' if r['accepted'] else 'NOT accepted'}")
        print("  predicted by decile:", r["deciles_predicted"])
        print("  observed by decile: ", r["deciles_observed"])
    return 0 if all(r["accepted"] for r in reports) else 1


if __name__ == "__main__":
    sys.exit(main())
