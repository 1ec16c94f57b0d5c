"""Reference whitening matrix of the residual chart: numpy's pseudo-inverse.

The residuals are those of a PCA on a bundled data set: standardise
(ddof = 0), keep the first m principal axes (scikit-learn PCA), r = z - P P' z,
rounded to float32 as the detector computes them. Then, in float64 from those
float32 values: S = covariance (ddof = 0), S+ = numpy.linalg.pinv(S,
rcond=1e-8, hermitian=True), W_ij = S+_ij / sqrt(S+_ii).

stdin: {"dataset": "wine" | "breast_cancer", "components": m}
stdout: {"residuals": [[...]], "w": [[...]], "eigenvalues": [...]}
(eigenvalues of S, descending)
"""
import json
import sys

import numpy as np
from sklearn import datasets
from sklearn.decomposition import PCA
from sklearn.preprocessing import StandardScaler

req = json.load(sys.stdin)
loader = {"wine": datasets.load_wine, "breast_cancer": datasets.load_breast_cancer}[req["dataset"]]
X = np.asarray(loader().data, dtype=np.float64)
Z = StandardScaler().fit_transform(X)
P = PCA(svd_solver="full").fit(Z).components_[: req["components"]].T
R = (Z - Z @ P @ P.T).astype(np.float32).astype(np.float64)
S = np.cov(R, rowvar=False, bias=True)
Sp = np.linalg.pinv(S, rcond=1e-8, hermitian=True)
W = Sp / np.sqrt(np.diag(Sp))[:, None]
json.dump(
    {
        "residuals": R.tolist(),
        "w": W.tolist(),
        "eigenvalues": np.sort(np.linalg.eigvalsh(S))[::-1].tolist(),
    },
    sys.stdout,
)
