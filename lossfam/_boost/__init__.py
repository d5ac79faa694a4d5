"""The engine-neutral boosting core: what LightGBM and XGBoost training share.

The engine adapters (``lossfam.lightgbm``, ``lossfam.xgboost``) translate; this
package decides.  It reads a family's engine facts (``lossfam.Family``,
"Engine facts") and never asks which family it holds, so a user-registered
family gets the same treatment as a built-in one.

==================  ==========================================================
module              holds
==================  ==========================================================
``facts``           the family's engine facts as numbers: dispersion unit,
                    native twin parameters, leaf-value level; and the
                    engines' own sample quantile definitions (leaf renewal)
``quantiles``       sample quantiles per group (midpoint of the minimisers,
                    Hyndman-Fan 1, 6, 7): baselines and leaf values
``gradients``       the step guard (``step_limit``), gradient/Hessian assembly
                    (unit, guard, checks), target caching, the far-start warning
``plan``            the start plan (baseline given offset and weights,
                    starting scores, nuisance pre-fit), the final nuisance fit
                    and the check of the trained scores
``leaves``          leaf-value tables (weighted median / quantile, line search)
                    and lossfam's own row bagging for the refit path
``scoring``         the weighted metric (nll or unit deviance)
``model``           ``BoostedFit`` (the trained model of both engines) and ``load``
``cluster``         training on a Dask cluster: ``ClusterData``, the checks,
                    baseline (exact weighted quantile by selection), nuisance
                    fit and metric as reductions over partitions, lazy predictions
==================  ==========================================================

Nothing here imports an engine.
"""
