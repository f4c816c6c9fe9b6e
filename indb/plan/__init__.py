"""SQL plans: pure functions from a spec, its resolved design and coefficients to syntax trees.

Nothing here touches a connection. One module per query family:

* :mod:`~indb.plan.context`: :class:`~indb.plan.context.PlanContext` (spec, checked inputs,
  dialect) and the internal column names the queries share;
* :mod:`~indb.plan.profile`: the pre-fit scans (describe, knots, the head of the rows, profile,
  levels);
* :mod:`~indb.plan.fold`: the compressed route (fold, folded profile, folded rows);
* :mod:`~indb.plan.sample`: the sample start's rows;
* :mod:`~indb.plan.irls_scan`: the IRLS scan (X'WX, X'Wz, deviance, Pearson) and the
  per-row stages it shares with the log-likelihood and theta queries;
* :mod:`~indb.plan.log_scan`: the log-link scan with the factor effects multiplied in later.
* :mod:`~indb.plan.assess_scan`: a stored model judged on new rows (the check items, the
  band scan, the constant-rate model's scan); :mod:`~indb.plan.assess_order`: its order scan
  (tie groups, a running sum of exposure along each ordered part, the bands' edges and the
  Gini's sum).
"""
