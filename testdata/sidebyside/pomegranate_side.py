#!/usr/bin/python3
"""pomegranate's half of the side-by-side timing (see run.sh).

    pomegranate_side.py gen LEARNERS ANSWERS SEED > DATA
    pomegranate_side.py fit DATA ITERATIONS REPEATS > JSON
    pomegranate_side.py compare POMEGRANATE_JSON ATTAIN_JSON

The BKT model as a pomegranate 0.14.8 HiddenMarkovModel is built as in
testdata/pomegranate/make_fixtures.py (no end-state edges; classic BKT has
no mastered->not edge, so forget stays 0). As found there, fit() applies
max_iterations + 1 updates, so ITERATIONS updates are
fit(max_iterations=ITERATIONS-1, min_iterations=ITERATIONS-1).
"""

import json
import os
import sys
import time

os.environ.setdefault("OMP_NUM_THREADS", "1")
os.environ.setdefault("OPENBLAS_NUM_THREADS", "1")

import numpy  # noqa: E402
import pomegranate  # noqa: E402
from pomegranate import DiscreteDistribution, HiddenMarkovModel, State  # noqa: E402

TRUTH = {"prior": 0.3, "learn": 0.12, "guess": 0.2, "slip": 0.1, "forget": 0.0}
START = {"prior": 0.4, "learn": 0.2, "guess": 0.25, "slip": 0.15, "forget": 0.0}  # as in main.go


def build(p):
    model = HiddenMarkovModel(name="bkt")
    not_m = State(DiscreteDistribution({0: 1 - p["guess"], 1: p["guess"]}), name="not")
    mast = State(DiscreteDistribution({0: p["slip"], 1: 1 - p["slip"]}), name="mastered")
    model.add_states(not_m, mast)
    model.add_transition(model.start, not_m, 1 - p["prior"])
    model.add_transition(model.start, mast, p["prior"])
    model.add_transition(not_m, not_m, 1 - p["learn"])
    model.add_transition(not_m, mast, p["learn"])
    model.add_transition(mast, mast, 1.0)
    model.bake(merge="None")
    return model


def params_of(model):
    idx = {s.name: i for i, s in enumerate(model.states)}
    t = model.dense_transition_matrix()
    s, n, m = idx["bkt-start"], idx["not"], idx["mastered"]
    dn = model.states[n].distribution.parameters[0]
    dm = model.states[m].distribution.parameters[0]
    return {"prior": float(t[s, m] / (t[s, n] + t[s, m])), "learn": float(t[n, m]),
            "guess": float(dn[1]), "slip": float(dm[0]), "forget": float(t[m, n])}


def gen(learners, answers, seed):
    rng = numpy.random.RandomState(seed)
    p = TRUTH
    for _ in range(learners):
        mastered = rng.random_sample() < p["prior"]
        out = []
        for _ in range(answers):
            if mastered:
                out.append("1" if rng.random_sample() >= p["slip"] else "0")
            else:
                out.append("1" if rng.random_sample() < p["guess"] else "0")
            if not mastered:
                mastered = rng.random_sample() < p["learn"]
        print("".join(out))


def fit(path, iterations, repeats):
    with open(path) as f:
        seqs = [numpy.array([int(c) for c in line.strip()]) for line in f if line.strip()]
    best_wall = best_cpu = float("inf")
    model = None
    for _ in range(repeats):
        model = build(START)
        w0, c0 = time.perf_counter(), time.process_time()
        model.fit(seqs, algorithm="baum-welch", max_iterations=iterations - 1,
                  min_iterations=iterations - 1, stop_threshold=1e-300, pseudocount=None,
                  transition_pseudocount=0, emission_pseudocount=0.0, use_pseudocount=False,
                  edge_inertia=0.0, distribution_inertia=0.0, n_jobs=1,
                  multiple_check_input=False)
        w, c = time.perf_counter() - w0, time.process_time() - c0
        best_wall, best_cpu = min(best_wall, w), min(best_cpu, c)
    ll = float(sum(model.log_probability(s) for s in seqs))
    json.dump({"tool": "pomegranate " + pomegranate.__version__ + " HiddenMarkovModel.fit (n_jobs=1)",
               "wall_seconds": best_wall, "cpu_seconds": best_cpu, "iterations": iterations,
               "loglik": ll, "params": params_of(model), "learners": len(seqs),
               "answers": int(sum(len(s) for s in seqs))}, sys.stdout)
    print()


def compare(pom_path, att_path):
    with open(pom_path) as f:
        pom = json.load(f)
    with open(att_path) as f:
        att = json.load(f)
    rel = abs(pom["loglik"] - att["loglik"]) / abs(pom["loglik"])
    print("data: %d learners, %d answers; %d Baum-Welch updates from the same start; one core"
          % (att["learners"], att["answers"], att["iterations"]))
    for r in (pom, att):
        print("%-60s wall %8.4f s  cpu %8.4f s  loglik %.10f" % (r["tool"], r["wall_seconds"], r["cpu_seconds"], r["loglik"]))
        print("    %s" % ", ".join("%s %.6f" % (k, r["params"][k]) for k in ("prior", "learn", "guess", "slip", "forget")))
    print("final log-likelihoods: relative difference %.3g (must be <= 1e-6)" % rel)
    print("ratio pomegranate / attain: wall %.1f, cpu %.1f" % (pom["wall_seconds"] / att["wall_seconds"], pom["cpu_seconds"] / att["cpu_seconds"]))
    per = att["cpu_seconds"] / att["answers"] / att["iterations"] * 1e9
    print("attain: %.2f ns of CPU per answer per iteration (whole Fit, incl. the final likelihood pass)" % per)
    if att["learners"] != pom["learners"] or att["answers"] != pom["answers"] or att["iterations"] != pom["iterations"]:
        print("FAIL: the two runs did not see the same data or iterations")
        sys.exit(1)
    if not rel <= 1e-6:
        print("FAIL: log-likelihoods disagree")
        sys.exit(1)


if __name__ == "__main__":
    cmd = sys.argv[1] if len(sys.argv) > 1 else ""
    if cmd == "gen" and len(sys.argv) == 5:
        gen(int(sys.argv[2]), int(sys.argv[3]), int(sys.argv[4]))
    elif cmd == "fit" and len(sys.argv) == 5:
        fit(sys.argv[2], int(sys.argv[3]), int(sys.argv[4]))
    elif cmd == "compare" and len(sys.argv) == 4:
        compare(sys.argv[2], sys.argv[3])
    else:
        sys.exit(__doc__)
