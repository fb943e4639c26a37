"""nipype workflow factories (``init_<what>_wf``) built from :mod:`nl_unwarp.interfaces`."""
