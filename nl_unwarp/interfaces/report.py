"""Interface that writes the per-image quality report."""

from __future__ import annotations

import os

from nipype.interfaces.base import (
    BaseInterfaceInputSpec,
    File,
    SimpleInterface,
    TraitedSpec,
    traits,
)

from ._utils import optional

__all__ = ["ImageReport", "SinkReport"]


class _ImageReportInputSpec(BaseInterfaceInputSpec):
    in_file = File(exists=True, mandatory=True, desc="raw image, as the scanner reconstructed it")
    summary = File(exists=True, mandatory=True, desc="warp summary JSON (from MakeWarp)")
    field = File(exists=True, mandatory=True, desc="ITK displacement field (from MakeWarp)")
    jacobian = File(exists=True, desc="Jacobian determinant map (from MakeWarp)")
    corrected = File(exists=True, desc="corrected image, for the before/after comparison")
    magnitude = File(exists=True, desc="displacement magnitude map (from MakeWarp)")
    coil_file = File(
        exists=True,
        desc="coil model file: with magnitude and jacobian, a 3D page is made without reading the field",
    )
    diffusion_summary = File(
        exists=True, desc="a DWI's weighting summary JSON (from DiffusionWeighting): b deviation per shell"
    )
    decision = traits.Dict(desc="decision record (from DecideCorrection)")
    metadata = traits.Dict(desc="the image's sidecar metadata (the keys the decision read are shown)")
    title = traits.Str(desc="name shown on the page (default: the raw file's name)")


class _ImageReportOutputSpec(TraitedSpec):
    out_report = File(exists=True, desc="the report page (self-contained HTML)")


class ImageReport(SimpleInterface):
    """Write one image's HTML quality report.

    Calls :func:`nl_unwarp.report.files.write_image_report`; writes
    ``report.html`` in the node's folder (:class:`SinkReport` puts it in place).

    Examples
    --------
    >>> report = ImageReport(title="sub-01/anat/sub-01_T1w.nii.gz")
    >>> report.inputs.in_file = "sub-01_T1w.nii.gz"  # doctest: +SKIP
    >>> report.inputs.summary = "summary.json"  # doctest: +SKIP
    >>> report.inputs.field = "field.nii.gz"  # doctest: +SKIP
    >>> report.run().outputs.out_report  # doctest: +SKIP
    '.../report.html'
    """

    input_spec = _ImageReportInputSpec
    output_spec = _ImageReportOutputSpec

    def _run_interface(self, runtime):
        from ..report.files import write_image_report

        def given(name):
            return optional(self.inputs, name)

        out = os.path.join(runtime.cwd, "report.html")
        write_image_report(
            out,
            raw_file=self.inputs.in_file,
            summary=self.inputs.summary,
            field_file=self.inputs.field,
            jacobian_file=given("jacobian"),
            corrected_file=given("corrected"),
            magnitude_file=given("magnitude"),
            coil_file=given("coil_file"),
            diffusion_summary=given("diffusion_summary"),
            decision=given("decision"),
            metadata=given("metadata"),
            title=given("title"),
        )
        self._results["out_report"] = out
        return runtime


class _SinkReportInputSpec(BaseInterfaceInputSpec):
    in_report = File(exists=True, mandatory=True, desc="report page (from ImageReport)")
    out_path = traits.Str(mandatory=True, desc="where the page goes (e.g. DERIVATIVES/reports/NAME.html)")


class _SinkReportOutputSpec(TraitedSpec):
    out_report = File(exists=True, desc="the page in place")


class SinkReport(SimpleInterface):
    """Put a report page in place, atomically. Always runs, so a re-run restores a removed page.

    Examples
    --------
    >>> sink = SinkReport(out_path="/data/derivatives/nl_unwarp/reports/sub-01_T1w.html")
    >>> sink.inputs.in_report = "report.html"  # doctest: +SKIP
    >>> sink.run().outputs.out_report  # doctest: +SKIP
    '/data/derivatives/nl_unwarp/reports/sub-01_T1w.html'
    """

    input_spec = _SinkReportInputSpec
    output_spec = _SinkReportOutputSpec
    always_run = True

    def _run_interface(self, runtime):
        from pathlib import Path

        from ..report.files import write_page

        text = Path(self.inputs.in_report).read_text(encoding="utf-8")
        self._results["out_report"] = str(write_page(self.inputs.out_path, text))
        return runtime
