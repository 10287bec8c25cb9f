#!/usr/bin/python3
"""Reference values for fitjob's EM from Debian's python3-pomegranate 0.14.8.

Regenerate (from the repository root):

    /usr/bin/python3 testdata/pomegranate/make_fixtures.py

It writes testdata/pomegranate/fixtures.json, read by fitjob/em_test.go.

BKT as pomegranate's HiddenMarkovModel: two emitting states "not" and
"mastered" with DiscreteDistribution emissions over {0 = wrong, 1 = correct}
(P(1 | not) = guess, P(1 | mastered) = 1 - slip), explicit start edges
start->not = 1 - prior, start->mastered = prior, and transitions not->mastered
= learn, mastered->not = forget. No edge goes to the end state, so the model
is "infinite" in pomegranate's terms (bake sets finite = 0): a sequence may
end at any answer, the backward pass starts from log 1 in every emitting
state and the log-likelihood is the log-sum-exp of the last forward row, with
no end-state factor. That is exactly BKT's likelihood.

Classic BKT (forget fixed at 0) is written by leaving the mastered->not edge
out altogether: Baum-Welch re-estimates only edges that exist, so the
mastered row stays mastered->mastered = 1.

What this script found about pomegranate 0.14.8's fit (checked below with
assertions, on every Baum-Welch fixture):
  * fit(max_iterations=m) applies m + 1 parameter updates, not m: the loop
    calls from_summaries at the top of each pass (the first call has no
    summaries and does nothing) and breaks after the update once
    iteration >= m + 1. So "k iterations" here are k explicit
    summarize()/from_summaries() rounds, and the script checks that they
    equal fit(max_iterations=k-1, min_iterations=k-1) for k >= 2 and differ
    from k + 1 rounds. fit(max_iterations=0) itself fails in 0.14.8
    (UnboundLocalError: 'logs').
  * With pseudocount=None, transition_pseudocount=0, emission_pseudocount=0,
    use_pseudocount=False and no inertia (fit()'s defaults: checked equal
    by check_defaults), the update is plain Baum-Welch (read in hmm.pyx
    _from_summaries and DiscreteDistribution.from_summaries, and matched
    to ~1e-12 by fitjob's EM):
    start probabilities = expected first states / sequences, each row of
    transitions = expected transition counts over answers that have a
    successor, normalised per row, emissions = posterior-weighted counts
    normalised per state. No pseudo-counts, no weights.
  * fit() and explicit rounds differ by summation order only (fit()
    summarises sequence by sequence): up to 1.35e-10 in a parameter after
    20 updates on these fixtures (printed on every run).
"""

import json
import math
import os

import numpy
import pomegranate
from pomegranate import DiscreteDistribution, HiddenMarkovModel, State

assert pomegranate.__version__ == "0.14.8", pomegranate.__version__

HERE = os.path.dirname(os.path.abspath(__file__))


def build(p):
    """A baked pomegranate HMM equal to BKT with parameters p (a dict)."""
    model = HiddenMarkovModel(name="bkt")
    not_m = State(DiscreteDistribution({0: 1 - p["guess"], 1: p["guess"]}), name="not")
    mast = State(DiscreteDistribution({0: p["slip"], 1: 1 - p["slip"]}), name="mastered")
    model.add_states(not_m, mast)
    model.add_transition(model.start, not_m, 1 - p["prior"])
    model.add_transition(model.start, mast, p["prior"])
    model.add_transition(not_m, not_m, 1 - p["learn"])
    model.add_transition(not_m, mast, p["learn"])
    if p["forget"] > 0:
        model.add_transition(mast, not_m, p["forget"])
        model.add_transition(mast, mast, 1 - p["forget"])
    else:
        model.add_transition(mast, mast, 1.0)
    model.bake(merge="None")
    return model


def index(model, name):
    for i, s in enumerate(model.states):
        if s.name == name:
            return i
    raise KeyError(name)


def params_of(model):
    """Read BKT parameters back out of a pomegranate HMM."""
    t = model.dense_transition_matrix()
    s, n, m = index(model, "bkt-start"), index(model, "not"), index(model, "mastered")
    dn = model.states[n].distribution.parameters[0]
    dm = model.states[m].distribution.parameters[0]
    prior = t[s, m] / (t[s, n] + t[s, m])
    return {
        "prior": float(prior),
        "learn": float(t[n, m]),
        "guess": float(dn[1]),
        "slip": float(dm[0]),
        "forget": float(t[m, n]),
    }


def filtered(model, seq):
    """P(mastered at answer t | answers 1..t): pomegranate's forward matrix,
    normalised over the emitting states."""
    f = model.forward(numpy.array(seq))  # (len+1) x states, log
    n, m = index(model, "not"), index(model, "mastered")
    out = []
    for row in f[1:]:
        hi = max(row[n], row[m])
        out.append(float(math.exp(row[m] - hi) / (math.exp(row[n] - hi) + math.exp(row[m] - hi))))
    return out


def simulate(rng, p, learners, lengths):
    seqs = []
    for i in range(learners):
        n = lengths(rng)
        mastered = rng.random_sample() < p["prior"]
        seq = []
        for _ in range(n):
            if mastered:
                seq.append(int(rng.random_sample() >= p["slip"]))
            else:
                seq.append(int(rng.random_sample() < p["guess"]))
            if mastered:
                mastered = not (rng.random_sample() < p["forget"])
            else:
                mastered = rng.random_sample() < p["learn"]
        seqs.append(seq)
    return seqs


worst = [0.0]  # largest difference between fit() and explicit rounds


def baum_welch(seqs, start, k):
    """Parameters after exactly k Baum-Welch updates from start."""
    arrays = [numpy.array(s) for s in seqs]

    # k rounds of summarize (E-step) + from_summaries (M-step).
    manual = build(start)
    for _ in range(k):
        manual.summarize(arrays, algorithm="baum-welch")
        manual.from_summaries()
    got = params_of(manual)

    # The same through fit(): max_iterations = k - 1 gives k updates. (For
    # k = 1 fit(max_iterations=0) raises UnboundLocalError inside
    # pomegranate 0.14.8, so only the explicit rounds are used there.)
    if k >= 2:
        model = build(start)
        model.fit(arrays, algorithm="baum-welch", max_iterations=k - 1, min_iterations=k - 1,
                  stop_threshold=1e-300, pseudocount=None, transition_pseudocount=0,
                  emission_pseudocount=0.0, use_pseudocount=False, edge_inertia=0.0,
                  distribution_inertia=0.0, n_jobs=1)
        via_fit = params_of(model)
        # Equal up to summation order (fit summarises sequence by
        # sequence): seen up to ~1e-10 after 20 updates.
        for key in got:
            assert abs(got[key] - via_fit[key]) < 1e-8, (k, key, got[key], via_fit[key])
        worst[0] = max(worst[0], max(abs(got[key] - via_fit[key]) for key in got))

    # One update more is different (the count is not off by one).
    extra = build(start)
    for _ in range(k + 1):
        extra.summarize(arrays, algorithm="baum-welch")
        extra.from_summaries()
    plus = params_of(extra)
    assert any(abs(got[key] - plus[key]) > 1e-12 for key in got), (k, got, plus)

    ll = float(sum(manual.log_probability(a) for a in arrays))
    return {"iterations": k, "start": start, "params": got, "loglik": ll}


def check_defaults(seqs, start, k=5):
    """fit()'s defaults are plain Baum-Welch: the same as passing every
    pseudo-count and inertia as zero; use_pseudocount=True would change the
    update (each edge then adds its initial probability as a pseudo-count,
    add_transition's default)."""
    arrays = [numpy.array(s) for s in seqs]
    plain = build(start)
    plain.fit(arrays, algorithm="baum-welch", max_iterations=k - 1, min_iterations=k - 1,
              stop_threshold=1e-300)
    explicit = build(start)
    explicit.fit(arrays, algorithm="baum-welch", max_iterations=k - 1, min_iterations=k - 1,
                 stop_threshold=1e-300, pseudocount=None, transition_pseudocount=0,
                 emission_pseudocount=0.0, use_pseudocount=False, edge_inertia=0.0,
                 distribution_inertia=0.0)
    edge = build(start)
    edge.fit(arrays, algorithm="baum-welch", max_iterations=k - 1, min_iterations=k - 1,
             stop_threshold=1e-300, use_pseudocount=True)
    a, b, c = params_of(plain), params_of(explicit), params_of(edge)
    assert all(a[key] == b[key] for key in a), (a, b)
    assert any(abs(a[key] - c[key]) > 1e-6 for key in a), (a, c)


def fixture(name, p, seqs, starts):
    model = build(p)
    arrays = [numpy.array(s) for s in seqs]
    seq_ll = [float(model.log_probability(a)) for a in arrays]
    return {
        "name": name,
        "params": p,
        "sequences": seqs,
        "seq_loglik": seq_ll,
        "loglik": float(sum(seq_ll)),
        "filtered": [filtered(model, s) for s in seqs],
        "baum_welch": [baum_welch(seqs, st, k) for st in starts for k in (1, 5, 20)],
    }


def P(prior, learn, guess, slip, forget):
    return {"prior": prior, "learn": learn, "guess": guess, "slip": slip, "forget": forget}


def main():
    rng = numpy.random.RandomState(20240607)
    fixtures = []

    # Hand-made sequences: length 1, all correct, all wrong, alternating.
    hand = [[1], [0], [1, 1, 1, 1, 1, 1], [0, 0, 0, 0, 0], [1, 0, 1, 0, 1, 0, 1],
            [0, 0, 1, 1, 1, 0, 1, 1, 1, 1], [0, 1]]
    fixtures.append(fixture("hand", P(0.3, 0.1, 0.2, 0.1, 0.0), hand,
                            [P(0.4, 0.2, 0.25, 0.15, 0.05), P(0.3, 0.1, 0.2, 0.1, 0.0)]))

    # A small cohort with varying lengths, forget present in the truth.
    truth = P(0.35, 0.12, 0.22, 0.1, 0.03)
    cohort = simulate(rng, truth, 40, lambda r: int(r.randint(1, 26)))
    check_defaults(cohort, P(0.5, 0.2, 0.3, 0.2, 0.1))
    fixtures.append(fixture("cohort", truth, cohort,
                            [P(0.5, 0.2, 0.3, 0.2, 0.1), P(0.2, 0.05, 0.15, 0.05, 0.0)]))

    # Longer sequences with strong forgetting.
    truth = P(0.2, 0.3, 0.15, 0.2, 0.1)
    forgetful = simulate(rng, truth, 25, lambda r: 50)
    fixtures.append(fixture("forgetful", truth, forgetful,
                            [P(0.3, 0.2, 0.25, 0.1, 0.2)]))

    # One long sequence (3000 answers): scaling over many steps.
    truth = P(0.1, 0.01, 0.3, 0.15, 0.005)
    long_ = simulate(rng, truth, 1, lambda r: 3000)
    fixtures.append(fixture("long", truth, long_, [P(0.3, 0.05, 0.2, 0.2, 0.02)]))

    out = {
        "generator": "testdata/pomegranate/make_fixtures.py",
        "library": "pomegranate " + pomegranate.__version__ + " (Debian python3-pomegranate), numpy " + numpy.__version__,
        "fixtures": fixtures,
    }
    print("largest |fit() - explicit rounds| over all Baum-Welch fixtures: %.3g" % worst[0])
    with open(os.path.join(HERE, "fixtures.json"), "w") as f:
        json.dump(out, f, indent=1)
        f.write("\n")


if __name__ == "__main__":
    main()
