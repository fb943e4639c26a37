"""Interfaces between BIDS metadata and the warp: the per-image decision and the derivatives sink."""

from __future__ import annotations

from nipype.interfaces.base import (
    BaseInterfaceInputSpec,
    File,
    SimpleInterface,
    TraitedSpec,
    isdefined,
    traits,
)

from ._utils import optional

__all__ = ["DecideCorrection", "WriteDerivatives"]


class _DecideCorrectionInputSpec(BaseInterfaceInputSpec):
    in_file = File(exists=True, mandatory=True,
                   desc="image to decide for (its header gives the slice geometry)")
    metadata = traits.Dict(mandatory=True,
                           desc="the image's sidecar metadata, BIDS inheritance applied "
                                "(e.g. BIDSLayout.get_metadata)")
    site_config = File(exists=True, desc="site configuration (nl_unwarp-site JSON)")
    coil_override = File(exists=True, desc="coil model used for every image instead of the rules' own")
    isocenter_offset_mm = traits.List(traits.Float, minlen=3, maxlen=3,
                                      desc="device coordinates (mm) of the world origin, overriding "
                                           "TablePosition")


class _DecideCorrectionOutputSpec(TraitedSpec):
    action = traits.Enum("full", "throughplane", "skip", desc="the decision")
    mode = traits.Enum("full", "throughplane", desc="warp mode for the generator")
    reason = traits.Str(desc="why")
    coil_model = File(exists=True, desc="coil model file for the generator")
    patient_position = traits.Str(desc="DICOM PatientPosition for the generator")
    table_position_mm = traits.List(traits.Float, desc="TablePosition (mm) for the generator, if known")
    isocenter_offset_mm = traits.List(traits.Float, desc="isocenter offset override (mm), if given")
    decision = traits.Dict(desc="JSON-ready decision record (no coil model path)")


class DecideCorrection(SimpleInterface):
    """Turn a sidecar and the site configuration into the warp generator's inputs and a decision.

    Calls :func:`nl_unwarp.bids.decisions.decide_file`. Refuses our own outputs
    (their sidecars carry ``NLUnwarpProvenance``).

    Examples
    --------
    >>> decide = DecideCorrection()
    >>> decide.inputs.in_file = "sub-01_acq-2d_T2w.nii.gz"  # doctest: +SKIP
    >>> decide.inputs.metadata = {"Manufacturer": "Fictive Magnetics",
    ...                           "ImageType": ["ORIGINAL", "PLANEFIX"]}  # doctest: +SKIP
    >>> decide.inputs.site_config = "sites.json"  # doctest: +SKIP
    >>> res = decide.run()  # doctest: +SKIP
    >>> res.outputs.action, res.outputs.mode  # doctest: +SKIP
    ('throughplane', 'throughplane')
    """

    input_spec = _DecideCorrectionInputSpec
    output_spec = _DecideCorrectionOutputSpec

    def _run_interface(self, runtime):
        from ..bids.decisions import decide_file

        decision = decide_file(self.inputs.in_file, self.inputs.metadata,
                               site_config=optional(self.inputs, "site_config"),
                               coil_override=optional(self.inputs, "coil_override"),
                               isocenter_offset_mm=optional(self.inputs, "isocenter_offset_mm", tuple))
        self._results.update(action=decision.action, mode=decision.mode, reason=decision.reason,
                             coil_model=decision.coil_path, patient_position=decision.position,
                             decision=decision.as_record())
        if decision.table_position_mm is not None:
            self._results["table_position_mm"] = list(decision.table_position_mm)
        if decision.isocenter_offset_mm is not None:
            self._results["isocenter_offset_mm"] = list(decision.isocenter_offset_mm)
        return runtime


class _WriteDerivativesInputSpec(BaseInterfaceInputSpec):
    out_dir = traits.Str(mandatory=True, desc="root of the derivatives dataset")
    source_relpath = traits.Str(mandatory=True, desc="source image path relative to the raw dataset")
    metadata = traits.Dict(mandatory=True, desc="source sidecar metadata (inheritance applied)")
    decision = traits.Dict(mandatory=True, desc="decision record (from DecideCorrection)")
    parameters = traits.Dict(desc="correction parameters to record (order, jacobian, ...)")
    summary = File(exists=True, mandatory=True, desc="warp summary JSON (from MakeWarp)")
    corrected = File(exists=True, desc="corrected image")
    field = File(exists=True, desc="displacement field")
    jacobian = File(exists=True, desc="Jacobian determinant map")
    magnitude = File(exists=True, desc="displacement magnitude map")
    companions = traits.Dict(traits.Str, traits.Str,
                             desc="destination (relative to out_dir) -> file: bval, bvec, events")


class _WriteDerivativesOutputSpec(TraitedSpec):
    out_files = traits.List(File(exists=True), desc="files written into the derivatives dataset")


class WriteDerivatives(SimpleInterface):
    """Write one image's derivatives (all files at once) into a BIDS derivatives dataset.

    Calls :func:`nl_unwarp.bids.derivatives.sink_image`. Always runs, so that a
    re-run restores derivatives removed since.

    Examples
    --------
    >>> sink = WriteDerivatives(out_dir="/data/derivatives/nl_unwarp")
    >>> sink.inputs.source_relpath = "sub-01/anat/sub-01_T1w.nii.gz"
    >>> sink.inputs.corrected = "corrected.nii.gz"  # doctest: +SKIP
    >>> sink.inputs.summary = "summary.json"  # doctest: +SKIP
    >>> sink.run().outputs.out_files  # doctest: +SKIP
    ['/data/derivatives/nl_unwarp/sub-01/anat/sub-01_desc-gnc_T1w.nii.gz', ...]
    """

    input_spec = _WriteDerivativesInputSpec
    output_spec = _WriteDerivativesOutputSpec
    always_run = True

    def _run_interface(self, runtime):
        from ..bids.derivatives import sink_image

        files = {k: getattr(self.inputs, k) for k in ("corrected", "field", "jacobian", "magnitude")
                 if isdefined(getattr(self.inputs, k))}
        params = optional(self.inputs, "parameters") or {}
        companions = optional(self.inputs, "companions") or {}
        written = sink_image(self.inputs.out_dir, self.inputs.source_relpath,
                             metadata=self.inputs.metadata, decision=self.inputs.decision,
                             parameters=params, summary_file=self.inputs.summary, files=files,
                             companions=companions)
        self._results["out_files"] = [str(p) for p in written]
        return runtime
