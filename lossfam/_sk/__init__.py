"""Implementation of lossfam.sklearn (import the public names from there).

``_solvers`` needs only numpy and scipy; the estimator modules import scikit-learn.
"""
