"""HTML quality reports: per image, per dataset, per coil model.

Self-contained pages (figures embedded as PNG, CSS and a few lines of script
inline, nothing fetched from the network), built with matplotlib's Agg canvas
and the standard library's :mod:`html` and :mod:`string` templates.

* :func:`~nl_unwarp.report.files.write_image_report`: one image and its warp;
* :func:`~nl_unwarp.report.files.write_dataset_report`: the index of a derivatives dataset;
* :func:`~nl_unwarp.report.files.write_coil_page`: a coil model.

The page renderers (:mod:`nl_unwarp.report.pages`) take arrays and records,
the numbers come from :mod:`nl_unwarp.report.stats`.
"""

from .files import write_coil_page, write_dataset_report, write_image_report
from .html import CAUTION

__all__ = ["CAUTION", "write_coil_page", "write_dataset_report", "write_image_report"]
