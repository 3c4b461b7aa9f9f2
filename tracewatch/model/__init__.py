"""Model stage: the baseline model and what it is made of.

    baseline.py   fit_baseline, the fitted Baseline, its judge, the storage table ARRAYS
    fit.py        ClusterModel (k-means, the knee, the silhouette, contamination)
    calibrate.py  Calibration (split-conformal p-values)
    estimators.py NgramVectorizer, ConformalThreshold: the scikit-learn estimators fit uses
    score.py      the scorer plug-ins (SCORERS) and the cached SessionScorer
    explain.py    why a session was flagged
    arrays.py     the storage table's row type and the checks save and load share
"""
