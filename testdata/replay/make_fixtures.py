#!/usr/bin/python3
"""Reference values for replay's metrics.json, computed independently of attain.

Reads a predictions.csv written by `attain replay` and the parameter file it
was replayed under, and writes (to stdout) the JSON that
fitjob/replay_test.go compares metrics.json with (to 1e-9):

  * AUC, log-loss, RMSE and accuracy, overall and per skill, by Debian's
    python3-sklearn 1.2.1 (roc_auc_score, log_loss, mean_squared_error,
    accuracy_score);
  * per skill, the prediction for every answer is recomputed here from the
    learner's previous mastery at that skill (the mastery column) by the
    BKT prediction P(correct) = P(L)(1-S) + (1-P(L))G (Corbett &
    Anderson 1995), with the prior before the
    first answer; the overall p_correct of a row tagged with several skills
    must be their mean;
  * calibration bins, learning curves, and per policy the mastery outcomes
    (first reach of the threshold, stuck at the N-th opportunity without
    mastery, next answer after the first reach), with quartiles by
    numpy.percentile (linear interpolation, its default).

Usage: /usr/bin/python3 testdata/replay/make_fixtures.py
reads predictions.csv and params-a.json beside this script and writes
expected.json beside it (testdata/regenerate.sh runs it so; regenerate.sh
here first replays answers.jsonl to refresh predictions.csv). Given
PREDICTIONS PARAMS as arguments, it writes the JSON to standard output.
"""

import csv
import json
import math
import os
import sys
from collections import OrderedDict, defaultdict

import numpy as np
import sklearn
from sklearn.metrics import accuracy_score, log_loss, mean_squared_error, roc_auc_score

# The what-if grid the test replays with: thresholds outer, stuck-after inner.
POLICIES = [(0.95, 10), (0.95, 5), (0.9, 10), (0.9, 5)]
CURVE_MAX = 100  # fitjob.DefaultCurveOpportunities


def scores(y, p):
    out = {"answers": len(y), "correct": int(sum(y))}
    if len(set(y)) == 2:
        out["auc"] = float(roc_auc_score(y, p))
    else:
        out["auc"] = None
    if y:
        out["logloss"] = float(log_loss(y, p, labels=[0, 1]))
        out["rmse"] = float(math.sqrt(mean_squared_error(y, p)))
        out["accuracy"] = float(accuracy_score(y, [1 if q >= 0.5 else 0 for q in p]))
    return out


def calibration(y, p):
    bins = [{"count": 0, "sp": 0.0, "sy": 0.0} for _ in range(10)]
    for yi, pi in zip(y, p):
        b = 0
        while b < 9 and pi >= (b + 1) / 10:
            b += 1
        bins[b]["count"] += 1
        bins[b]["sp"] += pi
        bins[b]["sy"] += yi
    out = []
    for b in bins:
        n = b["count"]
        out.append({"count": n,
                    "mean_predicted": b["sp"] / n if n else None,
                    "observed_correct": b["sy"] / n if n else None})
    return out


def mastery_stats(seqs, keys, threshold, stuck_after):
    """seqs[(learner, skill)] = [(mastery_after, correct), ...] in applied order."""
    st = {"learner_skills": 0, "reached": 0, "reach_events": 0, "stuck": 0,
          "stuck_then_reached": 0, "answered_after_mastery": 0, "wrong_after_mastery": 0}
    firsts = []
    learners = set()
    for key in keys:
        seq = seqs[key]
        st["learner_skills"] += 1
        prev = False
        ever = False
        first = None
        stuck = None
        for k, (m, c) in enumerate(seq, start=1):
            mastered = m >= threshold
            if mastered and not prev:
                st["reach_events"] += 1
                if first is None:
                    first = k
            if mastered:
                ever = True
            if stuck_after > 0 and k == stuck_after and not ever:
                stuck = k
            prev = mastered
        if first is not None:
            st["reached"] += 1
            firsts.append(first)
            learners.add(key[0])
            if first < len(seq):
                st["answered_after_mastery"] += 1
                if seq[first][1] == 0:
                    st["wrong_after_mastery"] += 1
        if stuck is not None:
            st["stuck"] += 1
            if first is not None:
                st["stuck_then_reached"] += 1
    st["learners_reached"] = len(learners)
    if firsts:
        q1, med, q3 = np.percentile(firsts, [25, 50, 75])
        st["opportunities_to_mastery"] = {
            "q1": float(q1), "median": float(med), "q3": float(q3),
            "mean": float(np.mean(firsts)), "min": int(min(firsts)), "max": int(max(firsts)),
            "distribution": [{"opportunities": k, "learner_skills": firsts.count(k)} for k in sorted(set(firsts))],
        }
    else:
        st["opportunities_to_mastery"] = {"q1": None, "median": None, "q3": None, "mean": None,
                                          "min": None, "max": None, "distribution": []}
    return st


def main():
    here = os.path.dirname(os.path.abspath(__file__))
    if len(sys.argv) == 3:
        pred_path, params_path, out = sys.argv[1], sys.argv[2], sys.stdout
    else:
        pred_path, params_path = os.path.join(here, "predictions.csv"), os.path.join(here, "params-a.json")
        out = open(os.path.join(here, "expected.json"), "w")
    with open(params_path) as f:
        params = json.load(f)

    def skill_params(s):
        return params["skills"].get(s, params["default"])

    with open(pred_path, newline="") as f:
        rows = list(csv.DictReader(f))

    y_all, p_all = [], []
    learners = set()
    per_y, per_p = defaultdict(list), defaultdict(list)
    per_learners = defaultdict(set)
    curves = defaultdict(lambda: defaultdict(lambda: [0, 0, 0.0]))  # skill -> opp -> [n, wrong, sum(1-p)]
    last = {}
    seqs = OrderedDict()
    for r in rows:
        y = int(r["correct"])
        p = float(r["p_correct"])
        skills = r["skills"].split(";")
        if len(skills) == 1:
            mastery = {skills[0]: float(r["mastery"])}
        else:
            mastery = {}
            for kv in r["mastery"].split(";"):
                k, v = kv.split("=", 1)
                mastery[k] = float(v)
        ps = []
        for s in skills:
            prm = skill_params(s)
            key = (r["learner"], s)
            pl = last.get(key, prm["prior"])
            ps_ = pl * (1 - prm["slip"]) + (1 - pl) * prm["guess"]
            ps.append(ps_)
            per_y[s].append(y)
            per_p[s].append(ps_)
            per_learners[s].add(r["learner"])
            opp = len(seqs.get(key, [])) + 1
            if opp <= CURVE_MAX:
                c = curves[s][opp]
                c[0] += 1
                c[1] += 1 - y
                c[2] += 1 - ps_
            last[key] = mastery[s]
            seqs.setdefault(key, []).append((mastery[s], y))
        combined = ps[0] if len(ps) == 1 else sum(ps) / len(ps)
        if abs(combined - p) > 1e-12:
            sys.exit(f"answer {r['answer_id']}: p_correct {p} is not the BKT prediction {combined} from the previous mastery")
        y_all.append(y)
        p_all.append(p)
        learners.add(r["learner"])

    res = {"generated_by": f"make_fixtures.py with scikit-learn {sklearn.__version__}, numpy {np.__version__}"}
    res["overall"] = scores(y_all, p_all)
    res["overall"]["learners"] = len(learners)
    res["overall"]["calibration"] = calibration(y_all, p_all)
    res["skills"] = {}
    for s in sorted(per_y):
        sc = scores(per_y[s], per_p[s])
        sc["learners"] = len(per_learners[s])
        sc["calibration"] = calibration(per_y[s], per_p[s])
        sc["learning_curve"] = [
            {"opportunity": k, "answers": v[0], "observed_error": v[1] / v[0], "predicted_error": v[2] / v[0]}
            for k, v in sorted(curves[s].items())]
        res["skills"][s] = sc
    res["what_if"] = []
    for th, sa in POLICIES:
        w = mastery_stats(seqs, list(seqs), th, sa)
        w["threshold"], w["stuck_after"] = th, sa
        w["skills"] = {}
        for s in sorted(per_y):
            w["skills"][s] = mastery_stats(seqs, [k for k in seqs if k[1] == s], th, sa)
        res["what_if"].append(w)
    json.dump(res, out, indent=1, sort_keys=True)
    out.write("\n")
    if out is not sys.stdout:
        out.close()


if __name__ == "__main__":
    main()
