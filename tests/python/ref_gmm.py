"""Reference EM: scikit-learn GaussianMixture(covariance_type="diag") started
from given parameters.

stdin: {"rows": [[...]], "weights": [...], "means": [[...]], "variances": [[...]],
        "tol": float, "max_iter": int, "reg_covar": float}
stdout: {"weights", "means", "variances", "lower_bound", "n_iter", "converged",
         "mean_log_likelihood", "bic"}
"""
import json
import sys
import warnings

import numpy as np
from sklearn.mixture import GaussianMixture

req = json.load(sys.stdin)
X = np.asarray(req["rows"], dtype=np.float64)
var = np.asarray(req["variances"], dtype=np.float64)
gm = GaussianMixture(
    n_components=len(req["weights"]),
    covariance_type="diag",
    tol=req["tol"],
    max_iter=req["max_iter"],
    reg_covar=req["reg_covar"],
    weights_init=np.asarray(req["weights"]),
    means_init=np.asarray(req["means"]),
    precisions_init=1.0 / var,
    init_params="random",
    random_state=0,
)
with warnings.catch_warnings():
    warnings.simplefilter("ignore")
    gm.fit(X)
json.dump(
    {
        "weights": gm.weights_.tolist(),
        "means": gm.means_.tolist(),
        "variances": gm.covariances_.tolist(),
        "lower_bound": float(gm.lower_bound_),
        "n_iter": int(gm.n_iter_),
        "converged": bool(gm.converged_),
        "mean_log_likelihood": float(gm.score(X)),
        "bic": float(gm.bic(X)),
    },
    sys.stdout,
)
