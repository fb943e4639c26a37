"""nl_unwarp: gradient-nonlinearity correction for MRI pipelines (research use).

The package is layered: pure math (:mod:`~nl_unwarp.harmonics`,
:mod:`~nl_unwarp.coil`, :mod:`~nl_unwarp.frames`, :mod:`~nl_unwarp.warp`,
:mod:`~nl_unwarp.resample`) knows nothing of files; :mod:`nl_unwarp.io` reads
and writes images, transforms and coil models; :mod:`nl_unwarp.api` joins the
two for callers (the CLI, the nipype interfaces).
"""

__version__ = "0.1.0"
