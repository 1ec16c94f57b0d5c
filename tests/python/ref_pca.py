"""Reference PCA: scikit-learn StandardScaler + PCA on a bundled data set.

stdin: {"dataset": "iris" | "wine" | "breast_cancer"}
stdout: {"rows": [[...]], "explained_variance": [...], "ratio": [...], "components": [[...]]}
"""
import json
import sys

import numpy as np
from sklearn import datasets
from sklearn.decomposition import PCA
from sklearn.preprocessing import StandardScaler

req = json.load(sys.stdin)
loader = {
    "iris": datasets.load_iris,
    "wine": datasets.load_wine,
    "breast_cancer": datasets.load_breast_cancer,
}[req["dataset"]]
X = np.asarray(loader().data, dtype=np.float64)
Z = StandardScaler().fit_transform(X)
pca = PCA(svd_solver="full").fit(Z)
json.dump(
    {
        "rows": X.tolist(),
        "explained_variance": pca.explained_variance_.tolist(),
        "ratio": pca.explained_variance_ratio_.tolist(),
        "components": pca.components_.tolist(),
    },
    sys.stdout,
)
