"""Accuracy sweep of the clearance audit on synthetic corridors with planted encroachments.

Run: ``.venv/bin/python benchmarks/bench_audit_accuracy.py [n_seeds]``

For each seed and terrain, the corridor's truth classes feed ``build_line_model`` and
``audit_line`` (linear strain model); the truth at MOT comes from the independent
strain-integration change of state in ``tests/test_audit_accuracy.py``. Prints recall of
planted violations, clearance errors at survey and MOT, MOT sag errors (spans with >= 60 %
coverage, suspension-only spans and spans next to a dead-end separately), vegetation findings
on trees that truly clear the requirement by >= 0.5 m, and audit time.
"""
from __future__ import annotations

import importlib.util
import sys
import time
from pathlib import Path
from types import SimpleNamespace

import numpy as np

HERE = Path(__file__).resolve().parent
spec = importlib.util.spec_from_file_location("acc", HERE.parent / "tests" / "test_audit_accuracy.py")
acc = importlib.util.module_from_spec(spec)
spec.loader.exec_module(acc)


def run(seed: int, terrain: str) -> dict:
    from clearaudit.audit import AuditOptions, audit_line
    from clearaudit.audit.rules import load_rule_set
    from clearaudit.config import LineConfig
    from clearaudit.model import build_line_model
    from clearaudit.physics.conductors import conductor_from_config
    from clearaudit.synth import generate_corridor

    corridor = generate_corridor(seed=seed, terrain=terrain, n_spans=4, vegetation="mixed",
                                 conductor_temperature_c=acc.SURVEY_C)
    cloud, ter = corridor.cloud, corridor.terrain
    classification = SimpleNamespace(
        classification=corridor.truth_classification,
        height_above_ground_m=cloud.xyz[:, 2] - ter.height(cloud.xyz[:, 0], cloud.xyz[:, 1]),
        ground=SimpleNamespace(height_at=lambda xy: ter.height(xy[:, 0], xy[:, 1])))
    line = corridor.line_config["conductors"]
    conductors = {role: conductor_from_config({"name": line[role]["name"],
                                               "weight_n_per_m": line[role]["weight_n_per_m"],
                                               "diameter_m": line[role]["diameter_m"]})
                  for role in ("phase", "shield")}
    structures = [{"id": s["id"], "type": s["type"],
                   "xy": cloud.from_crs(np.array([s["x"], s["y"], cloud.origin[2]]))[:2]}
                  for s in corridor.structures]
    model = build_line_model(cloud, structures=structures, unit_weight_n_per_m={
        r: c.unit_weight_n_per_m for r, c in conductors.items()})
    config = LineConfig()
    config.line.voltage_kv = 230.0
    config.line.max_operating_temperature_c = acc.MOT_C
    config.survey.conductor_temperature_c = acc.SURVEY_C
    config.survey.conductor_temperature_uncertainty_c = 2.0
    rules = load_rule_set("na-transmission")
    t0 = time.perf_counter()
    result = audit_line(cloud, classification, model, config, conductors, rules,
                        options=AuditOptions(strain_model="linear"))
    seconds = time.perf_counter() - t0
    scene = SimpleNamespace(corridor=corridor, result=result,
                            truth=acc._truth_curves(corridor, conductors))
    required = rules.required("vegetation", "phase", 230.0,
                              altitude_m=result.summary["altitude_m"]).value_m
    labels = corridor.truth_labels["tree"]
    rows = [r for r in result.violations if r["kind"] == "vegetation"
            and r["finding"] != "fall_in" and r["condition"] in ("survey", "mot")]
    found = {(int(labels[r["cloud_index"]]), r["condition"]) for r in rows}
    expected = missed = 0
    for tree in corridor.truth["planted_trees"]:
        if tree["kind"] != "under":
            continue
        for cond in ("survey", "mot"):
            if acc._true_clearance(scene, tree["index"], cond) < required:
                expected += 1
                missed += (tree["index"], cond) not in found
    err = {"survey": [], "mot": []}
    false_pos = 0
    for r in rows:
        tree = int(labels[r["cloud_index"]])
        truth = acc._true_clearance(scene, tree, r["condition"]) if tree >= 0 else np.inf
        if truth >= required + 0.5:
            false_pos += 1
        elif np.isfinite(truth):
            err[r["condition"]].append(r["clearance_m"] - truth)
    sag_susp = [e for e in acc._mot_sag_errors(scene, False).values()]
    sag_dead = [e for e in acc._mot_sag_errors(scene, True).values()]
    return dict(seed=seed, terrain=terrain, expected=expected, missed=missed,
                survey=err["survey"], mot=err["mot"], false_pos=false_pos,
                sag_susp=sag_susp, sag_dead=sag_dead, seconds=seconds,
                points=cloud.n_points, findings=len(result.violations))


def _fmt(values):
    if not values:
        return "—"
    a = np.abs(values)
    return f"max {a.max():.3f} m, mean {np.mean(values):+.3f} m (n={len(values)})"


def main(n_seeds: int = 3) -> None:
    results = [run(seed, terrain) for seed in range(1, n_seeds + 1)
               for terrain in ("flat", "rolling", "steep")]
    for r in results:
        print(f"seed {r['seed']} {r['terrain']:8s} points {r['points']:>9,d}  audit "
              f"{r['seconds']:.1f} s  findings {r['findings']:3d}  planted violations "
              f"{r['expected'] - r['missed']}/{r['expected']}  false {r['false_pos']}")
    print("recall:", sum(r["expected"] - r["missed"] for r in results), "/",
          sum(r["expected"] for r in results))
    print("clearance error at survey:", _fmt(sum((r["survey"] for r in results), [])))
    print("clearance error at MOT:   ", _fmt(sum((r["mot"] for r in results), [])))
    print("MOT sag error, suspension spans:", _fmt(sum((r["sag_susp"] for r in results), [])))
    print("MOT sag error, dead-end spans:  ", _fmt(sum((r["sag_dead"] for r in results), [])))
    print("vegetation findings on trees clearing by >= 0.5 m:",
          sum(r["false_pos"] for r in results))


if __name__ == "__main__":
    main(int(sys.argv[1]) if len(sys.argv) > 1 else 3)
