"""Coil models from measurements: the field-sample fit, as a file-level function and a nipype Interface.

:func:`fit_field_sample_files` reads one field-sample file per gradient axis
(:mod:`nl_unwarp.io.samples`), fits the model (:func:`nl_unwarp.fit.fit_samples`)
and writes the coil model file, a summary JSON and, optionally, a report page
(:mod:`nl_unwarp.report.fitpage`) together, complete or not at all.
"""

from __future__ import annotations

import datetime
import json
import os
import re
from collections.abc import Mapping
from pathlib import Path

from nipype.interfaces.base import (
    BaseInterfaceInputSpec,
    File,
    SimpleInterface,
    TraitedSpec,
    traits,
)

from ..frames import PATIENT_POSITIONS
from ._utils import one_blas_thread, optional

__all__ = ["FIT_PAGE_NAME", "FitFieldSamples", "fit_field_sample_files"]

#: Name of the fit's report page inside the report folder (the coil model page sits beside it).
FIT_PAGE_NAME = "coil-fit.html"
CAUTION = ("For research pipelines only: not for diagnosis. A fitted coil model does not replace "
           "the scanner's QA; defer to local scanner QA and licensed practice.")


def _gradients(gradient_mT_per_m) -> dict:
    """Per-axis nominal gradients from one value, three values or a mapping (None: from the files)."""
    from ..coil import AXES

    if gradient_mT_per_m is None:
        return dict.fromkeys(AXES)
    if isinstance(gradient_mT_per_m, Mapping):
        return {a: gradient_mT_per_m.get(a) for a in AXES}
    if isinstance(gradient_mT_per_m, (int, float)):
        return dict.fromkeys(AXES, float(gradient_mT_per_m))
    values = list(gradient_mT_per_m)
    if len(values) == 1:
        return dict.fromkeys(AXES, float(values[0]))
    if len(values) != 3:
        from ..errors import InputError

        raise InputError("--gradient-mT-per-m", f"give one value for all axes or three (x y z), got "
                                                 f"{len(values)}")
    return {a: float(v) for a, v in zip(AXES, values, strict=True)}


def fit_field_sample_files(
    sample_files: Mapping[str, str | os.PathLike],
    out_coil: str | os.PathLike,
    *,
    gradient_mT_per_m=None,
    degree: int | None = None,
    max_degree: int | None = None,
    symmetry: str = "none",
    reference_radius_mm: float | None = None,
    valid_radius_mm: float | None = None,
    position: str | None = None,
    table_position_mm=None,
    isocenter_offset_mm=None,
    label: str = "fitted from field samples",
    description: str = "",
    date: str | None = None,
    out_summary: str | os.PathLike | None = None,
    report_dir: str | os.PathLike | None = None,
) -> dict:
    """Fit a coil model to field-sample files and write it (with summary and report).

    Parameters
    ----------
    sample_files : mapping of str to path
        ``{"x": ..., "y": ..., "z": ...}``: a sample table or NIfTI field map per axis.
    out_coil : path
        Coil model file to write (source kind ``fit``, method ``field-samples``).
    gradient_mT_per_m : float, three floats, mapping, or None
        Nominal gradients (mT/m); None: each file states its own.
    degree : int, optional
        Degree for every axis; None: chosen by cross-validation up to ``max_degree``.
    max_degree : int, optional
        Highest degree tried (default :data:`nl_unwarp.fit.DEFAULT_MAX_DEGREE`).
    symmetry : {"none", "mirror", "axial"}
        Terms a symmetric coil forbids are not fitted (:func:`nl_unwarp.fit.term_allowed`).
    reference_radius_mm, valid_radius_mm : float, optional
        Defaults: derived from the samples (:func:`nl_unwarp.fit.fit_samples`).
    position, table_position_mm, isocenter_offset_mm : optional
        NIfTI maps only: read their affines as world RAS (see :mod:`nl_unwarp.io.samples`).
    label, description, date : str
        Provenance; ``date`` defaults to today (UTC).
    out_summary : path, optional
        Summary JSON (the fit figures, warnings and inputs).
    report_dir : path, optional
        Folder for the report page (:data:`FIT_PAGE_NAME`) and the coil model page.

    Returns
    -------
    dict
        The summary (as written to ``out_summary``), with ``outputs`` listing
        the files written.

    Raises
    ------
    InputError
        Bad input, naming the file; nothing is written then.
    """
    from ..coil import AXES
    from ..errors import InputError
    from ..fit import DEFAULT_MAX_DEGREE, encoded_from_field, fit_samples
    from ..io.atomic import OutputSet
    from ..io.coilfile import LINEAR_TOLERANCE, coil_text
    from ..io.samples import load_field_samples

    missing = [a for a in AXES if not sample_files.get(a)]
    if missing:
        raise InputError("field samples", f"no samples given for gradient axis {', '.join(missing)}")
    gradients = _gradients(gradient_mT_per_m)
    loaded = {a: load_field_samples(sample_files[a], axis=a, gradient_mT_per_m=gradients[a],
                                    position=position, table_position_mm=table_position_mm,
                                    isocenter_offset_mm=isocenter_offset_mm) for a in AXES}
    samples = {a: (s.points_device_mm, encoded_from_field(s.bz_mT, gradient_mT_per_m=s.gradient_mT_per_m))
               for a, s in loaded.items()}
    date = date or datetime.datetime.now(datetime.timezone.utc).date().isoformat()
    try:
        with one_blas_thread():
            model, summary = fit_samples(
                samples, degree=degree, max_degree=max_degree or DEFAULT_MAX_DEGREE, symmetry=symmetry,
                reference_radius_mm=reference_radius_mm, valid_radius_mm=valid_radius_mm, label=label,
                description=description, date=date, method="field-samples")
    except ValueError as exc:
        found = re.match(r"axis ([xyz]): ", str(exc))
        where = loaded[found.group(1)].source if found else ", ".join(s.source for s in loaded.values())
        raise InputError(where, str(exc)) from None
    for a in AXES:
        linear = model.axes[a].linear_coefficient(a)
        if abs(linear - 1.0) > LINEAR_TOLERANCE:
            raise InputError(loaded[a].source, (
                f"gradient_mT_per_m: the fitted linear term is {linear:.4g}, not about 1: the nominal "
                f"gradient {loaded[a].gradient_mT_per_m:g} mT/m is not this coil's, or bz_mT is not "
                "in mT"))
    record = summary.as_dict()
    record["inputs"] = {a: {"file": s.source, "samples": int(s.bz_mT.size),
                            "gradient_mT_per_m": s.gradient_mT_per_m, "frame": s.frame_note}
                        for a, s in loaded.items()}
    record["coil_model"] = {"label": model.label, "source": model.source}
    record["caution"] = CAUTION
    text = coil_text(model)
    import hashlib

    record["coil_model"]["sha256"] = hashlib.sha256(text.encode("utf-8")).hexdigest()
    with OutputSet() as outputs:
        written = [str(out_coil)]
        outputs.reserve(out_coil).write_text(text, encoding="utf-8")
        if report_dir is not None:
            from ..report.fitpage import coil_page_file_name, render_fit_pages

            fit_html, coil_html = render_fit_pages(record, model, samples)
            folder = Path(report_dir)
            for name, html in ((FIT_PAGE_NAME, fit_html),
                               (coil_page_file_name(record["coil_model"]["sha256"]), coil_html)):
                outputs.reserve(folder / name).write_text(html, encoding="utf-8")
                written.append(str(folder / name))
        if out_summary is not None:
            written.append(str(out_summary))
        record["outputs"] = written
        if out_summary is not None:
            outputs.reserve(out_summary).write_text(json.dumps(record, indent=2) + "\n", encoding="utf-8")
    return record


class _FitFieldSamplesInputSpec(BaseInterfaceInputSpec):
    x_samples = File(exists=True, mandatory=True, desc="field samples of the x coil (TSV table or NIfTI map)")
    y_samples = File(exists=True, mandatory=True, desc="field samples of the y coil")
    z_samples = File(exists=True, mandatory=True, desc="field samples of the z coil")
    gradient_mT_per_m = traits.Float(desc="nominal gradient of every coil, mT/m (default: stated in "
                                          "each table)")
    degree = traits.Either(traits.Enum("auto"), traits.Range(low=1, high=60), default="auto",
                           usedefault=True, desc="harmonic degree; auto: held-out cross-validation")
    max_degree = traits.Range(low=1, high=60, value=15, usedefault=True,
                              desc="highest degree tried by cross-validation")
    symmetry = traits.Enum("none", "mirror", "axial", usedefault=True,
                           desc="leave out the terms a symmetric coil design forbids")
    reference_radius_mm = traits.Float(desc="R0 of the model (default: the sampled radius)")
    valid_radius_mm = traits.Float(desc="valid radius (default: the radius the samples cover)")
    patient_position = traits.Enum(*PATIENT_POSITIONS,
                                   desc="NIfTI maps: read the affine as world RAS for this position")
    table_position_mm = traits.List(traits.Float, minlen=3, maxlen=3,
                                    desc="NIfTI maps: BIDS TablePosition (mm)")
    isocenter_offset_mm = traits.List(traits.Float, minlen=3, maxlen=3,
                                      desc="NIfTI maps: device coordinates (mm) of the world origin")
    label = traits.Str("fitted from field samples", usedefault=True, desc="label of the coil model")
    date = traits.Str(desc="provenance date, ISO 8601 (default: today, UTC)")


class _FitFieldSamplesOutputSpec(TraitedSpec):
    out_coil = File(exists=True, desc="coil model file (nl_unwarp-coil JSON, source kind fit)")
    out_summary = File(exists=True, desc="fit summary JSON: residuals, predicted error, warnings")
    out_report = File(exists=True, desc="report page of the fit (HTML)")


class FitFieldSamples(SimpleInterface):
    """Fit a coil model to field samples of the three gradient coils.

    Calls :func:`fit_field_sample_files`; writes ``coil.json``, ``summary.json``
    and ``report/coil-fit.html`` in the node's folder.

    Examples
    --------
    >>> fit = FitFieldSamples(symmetry="mirror")
    >>> fit.inputs.x_samples = "x.tsv"  # doctest: +SKIP
    >>> fit.inputs.y_samples = "y.tsv"  # doctest: +SKIP
    >>> fit.inputs.z_samples = "z.tsv"  # doctest: +SKIP
    >>> fit.run().outputs.out_coil  # doctest: +SKIP
    '.../coil.json'
    """

    input_spec = _FitFieldSamplesInputSpec
    output_spec = _FitFieldSamplesOutputSpec

    def _run_interface(self, runtime):
        i = self.inputs
        paths = {"coil": os.path.join(runtime.cwd, "coil.json"),
                 "summary": os.path.join(runtime.cwd, "summary.json")}
        report_dir = os.path.join(runtime.cwd, "report")
        fit_field_sample_files(
            {"x": i.x_samples, "y": i.y_samples, "z": i.z_samples}, paths["coil"],
            gradient_mT_per_m=optional(i, "gradient_mT_per_m"),
            degree=None if i.degree == "auto" else int(i.degree), max_degree=i.max_degree,
            symmetry=i.symmetry, reference_radius_mm=optional(i, "reference_radius_mm"),
            valid_radius_mm=optional(i, "valid_radius_mm"), position=optional(i, "patient_position"),
            table_position_mm=optional(i, "table_position_mm"),
            isocenter_offset_mm=optional(i, "isocenter_offset_mm"), label=i.label,
            date=optional(i, "date"), out_summary=paths["summary"], report_dir=report_dir)
        self._results.update(out_coil=paths["coil"], out_summary=paths["summary"],
                             out_report=os.path.join(report_dir, FIT_PAGE_NAME))
        return runtime
