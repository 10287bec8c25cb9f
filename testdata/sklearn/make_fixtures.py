#!/usr/bin/python3
"""Reference values for attain's prediction metrics (fitjob/metrics.go).

Run with Debian's interpreter, which has python3-sklearn 1.2.1 and
python3-numpy:

    /usr/bin/python3 testdata/sklearn/make_fixtures.py > testdata/sklearn/fixtures.json

Each case is a vector of outcomes y (1 = correct) and predictions p. For each
case the script records:
  auc       sklearn.metrics.roc_auc_score(y, p)
  logloss   sklearn.metrics.log_loss(y, p)           (eps="auto": float64 machine epsilon in 1.2.1)
  rmse      sklearn.metrics.mean_squared_error(y, p, squared=False)
  accuracy  sklearn.metrics.accuracy_score(y, p >= 0.5)
  calibration  sklearn.calibration.calibration_curve(y, p, n_bins=10, strategy="uniform"):
            prob_true and prob_pred of the non-empty bins, in bin order; null for a
            case with a prediction on an interior bin edge, because sklearn 1.2.1
            puts an edge value in the lower bin (searchsorted side="left") and
            attain puts it in the upper one ([0, 0.1), [0.1, 0.2), ...).
Floats are written with repr, which round-trips float64 exactly.
"""
import json
import sys

import numpy as np
import sklearn
from sklearn.calibration import calibration_curve
from sklearn.metrics import accuracy_score, log_loss, mean_squared_error, roc_auc_score

rng = np.random.default_rng(20240611)


def case(name, y, p):
    y = np.asarray(y, dtype=int)
    p = np.asarray(p, dtype=np.float64)
    out = {
        "name": name,
        "y": [int(v) for v in y],
        "p": [float(v) for v in p],
        "auc": float(roc_auc_score(y, p)),
        "logloss": float(log_loss(y, p)),
        "rmse": float(mean_squared_error(y, p, squared=False)),
        "accuracy": float(accuracy_score(y, (p >= 0.5).astype(int))),
        "calibration": None,
    }
    edges = np.linspace(0.0, 1.0, 11)[1:-1]
    if not np.any(np.abs(p[:, None] - edges[None, :]) < 1e-9):
        prob_true, prob_pred = calibration_curve(y, p, n_bins=10, strategy="uniform")
        out["calibration"] = {
            "prob_true": [float(v) for v in prob_true],
            "prob_pred": [float(v) for v in prob_pred],
        }
    return out


cases = []

# The example in roc_auc_score's own documentation (AUC 0.75).
cases.append(case("doc-example", [0, 0, 1, 1], [0.1, 0.4, 0.35, 0.8]))

# Heavy ties: four distinct predictions, off the bin edges.
y = rng.integers(0, 2, 400)
levels = np.array([0.15, 0.35, 0.55, 0.85])
p = levels[np.clip(y + rng.integers(0, 3, 400), 0, 3)]
cases.append(case("ties-heavy", y, p))

# Heavy ties on bin edges (no calibration reference, see above).
y = rng.integers(0, 2, 300)
levels = np.array([0.2, 0.5, 0.8])
p = levels[np.clip(y + rng.integers(0, 2, 300), 0, 2)]
cases.append(case("ties-on-edges", y, p))

# Every prediction the same: AUC 0.5.
y = rng.integers(0, 2, 50)
cases.append(case("all-tied", y, np.full(50, 0.62)))

# Tiny and huge probabilities, confidently wrong ones included: exercises
# the clipping of log-loss.
p = [0.0, 1.0, 1e-300, 1e-16, 2e-16, 3e-16, 1e-15, 1e-10, 1 - 1e-10, 1 - 1e-15,
     1 - 2e-16, 0.999999999999999, 5e-324, 1.0, 0.0, 0.5]
y = [1, 0, 0, 1, 1, 0, 1, 0, 1, 0, 1, 1, 0, 1, 0, 1]
cases.append(case("extremes", y, p))

# Uniform predictions unrelated to the outcome.
cases.append(case("uniform-1000", rng.integers(0, 2, 1000), rng.uniform(0, 1, 1000)))

# Perfectly separated and perfectly reversed.
cases.append(case("separable", [0, 0, 0, 1, 1], [0.05, 0.2, 0.31, 0.66, 0.97]))
cases.append(case("reversed", [1, 1, 0, 0, 0], [0.05, 0.2, 0.31, 0.66, 0.97]))

# Shaped like next-answer predictions: mostly correct answers, predictions
# between a guess and one minus a slip.
n = 5000
mastered = rng.uniform(0, 1, n)
p = 0.2 * (1 - mastered) + 0.9 * mastered
y = (rng.uniform(0, 1, n) < p).astype(int)
cases.append(case("bkt-like-5000", y, p))

json.dump({"sklearn": sklearn.__version__, "numpy": np.__version__, "cases": cases},
          sys.stdout, indent=1)
sys.stdout.write("\n")
