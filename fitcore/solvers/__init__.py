"""The solvers behind :func:`fitcore.fit` (the front door is :mod:`fitcore.solve`).

Modules, in the order a fit passes through them:

* :mod:`.setup` - checks the input and builds the whitened problem (``_prepare``);
* :mod:`.problem` - the problem over the used points and free parameters, the solver
  result ``_Inner``, scratch arrays, ``FitError`` and small shared helpers;
* :mod:`.dispatch` - one solver per kind of loss (``_run``);
* :mod:`.lm` - the reweighted, damped Gauss-Newton (Levenberg-Marquardt) loop and the
  iterative refinement of linear least squares;
* :mod:`.l1` - exact L1 by linear programming, sequential LP for nonlinear models;
* :mod:`.mscale` - M-estimates with a fixed or automatic scale, Newton's method with
  the scale tied to the MAD, exact fits;
* :mod:`.adaptive` - the adaptive loss (maximum-likelihood shape and scale);
* :mod:`.large` - subsamples and the staged warm start for large data;
* :mod:`.assemble` - covariance and the per-point values of the ``FitResult``;
* :mod:`.small_la` - numpy.linalg's solve, inverse, QR and SVD for the k x k work of
  small fits, without the wrappers' overhead (the same numbers).
"""
