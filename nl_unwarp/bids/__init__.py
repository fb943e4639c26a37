"""BIDS side of nl_unwarp: sidecar metadata, site configuration, decisions, derivatives.

* :mod:`~nl_unwarp.bids.metadata` reads what the correction needs from sidecars
  (BIDS inheritance principle, through pybids);
* :mod:`~nl_unwarp.bids.siteconfig` loads our site configuration format
  (``docs/site-config.md``): scanner rules -> coil model, per-site policy;
* :mod:`~nl_unwarp.bids.decisions` decides, per image, full correction,
  through-plane residual only, or skip, with the reason;
* :mod:`~nl_unwarp.bids.plan` indexes a dataset and makes the table of decisions;
* :mod:`~nl_unwarp.bids.names` holds every derivative file name in one place;
* :mod:`~nl_unwarp.bids.derivatives` writes the derivatives dataset.
"""
