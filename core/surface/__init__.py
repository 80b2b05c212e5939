"""The reflector surface: scattered elevation points to a grid with its standard deviation.

Modules, in the order of the data flow:

* :mod:`.base` - input checks, :class:`~.base.SurfaceGrid`, the distance mask,
  :class:`~.base.CrossValidation`;
* :mod:`.variogram` - experimental variogram, models, weighted least-squares fit;
* :mod:`.threads` - worker threads for batched solves, BLAS held to one thread;
* :mod:`.kriging` - ordinary kriging with measurement error, local neighbourhood,
  and the choice of variogram model by cross-validation;
* :mod:`.spline` - smoothing thin-plate spline;
* :mod:`.gridding` - :func:`~.gridding.interpolate_surface`, the pipeline's call;
* :mod:`.trend` - a regional plane removed before gridding and added back;
* :mod:`.contours` - contour lines of the gridded surfaces.
"""
