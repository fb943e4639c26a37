"""nipype Interfaces: thin wrappers over the library functions of nl_unwarp.

* :class:`~nl_unwarp.interfaces.warp.MakeWarp`: reference image + coil model -> field,
  Jacobian, displacement magnitude, summary;
* :class:`~nl_unwarp.interfaces.warp.ApplyWarp`: image + field (+ Jacobian) -> corrected image;
* :class:`~nl_unwarp.interfaces.bids.DecideCorrection`: sidecar + site configuration ->
  the generator's inputs and a decision;
* :class:`~nl_unwarp.interfaces.bids.WriteDerivatives`: one image's BIDS derivatives;
* :class:`~nl_unwarp.interfaces.fit.FitFieldSamples`: field samples of the three coils ->
  coil model file, fit summary, report page.

Submodules are imported on use, so that importing the package stays cheap.
"""
