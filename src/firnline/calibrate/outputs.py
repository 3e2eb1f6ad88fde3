"""The files of a calibration: calibrated.toml, calibration.json, the residuals, the figure.

:func:`write_calibration` writes them all or nothing; :func:`fit_table` is the
console table. TOML is written with tomli-w.
"""

from __future__ import annotations

import math
import tomllib  # Python 3.11+ (pyproject.toml requires it)
from pathlib import Path

import tomli_w

from .. import __version__
from ..config import PATH_KEYS, parse_config
from ..provenance import CAUTION
from .fit import CalibrationResult


def toml_text(data: dict, header: str = "") -> str:
    """A config mapping ({section: {key: value}}) as TOML text, with an optional comment header."""
    comments = "".join(f"# {h}\n" if h else "#\n" for h in header.splitlines())
    return comments + ("\n" if comments else "") + tomli_w.dumps(data)


def calibrated_config(result: CalibrationResult) -> dict:
    """The whole config as a TOML mapping, with the fitted values and absolute paths.

    Paths are written absolute so that the file runs from any folder; the output
    folder and the radiation cache folder are written even where they were defaults.
    """
    cfg = result.fitted
    data = {s: dict(v) for s, v in cfg.raw.items()}
    for section, key in sorted(PATH_KEYS):
        sec = getattr(cfg, section, None)
        if sec is None:
            continue
        value = getattr(sec, key)
        if value is None:
            continue
        if section in data or section in ("output", "radiation"):
            data.setdefault(section, {})[key] = str(Path(value))
    return data


def calibrated_toml(result: CalibrationResult, out_dir: Path) -> str:
    """calibrated.toml: the checked text (it parses as a config when placed in ``out_dir``)."""
    lines = [f"Written by firnline {__version__} calibrate from {result.config.source or 'a config'}.",
             "Fitted: " + ", ".join(f"{p} = {v:.6g}" for p, v in result.value.items())
             + (("; tied: " + ", ".join(f"{k} = {v:.6g}" for k, v in result.tied.items()))
                if result.tied else "") + ".",
             f"RMSE {result.rmse_mwe:.3f} m w.e. over {result.n_obs} observations (calibration.json).",
             "Paths are absolute. " + CAUTION]
    data = calibrated_config(result)
    if Path(data["output"]["dir"]).resolve() == Path(out_dir).resolve():
        # its runs must not go into the folder that holds it (an input is never overwritten)
        data["output"]["dir"] = str(Path(out_dir).resolve().with_name(Path(out_dir).name + "_fitted_run"))
        lines.append("[output] dir: beside the calibration folder, so a run never writes over this file.")
    text = toml_text(data, "\n".join(lines))
    parse_config(tomllib.loads(text), Path(out_dir).resolve())  # must run as it is
    return text


def fit_table(result: CalibrationResult) -> str:
    """The console table of the fit."""
    spec = result.spec
    w = max([len(p) for p in spec.parameters] + [len(k) for k in result.tied] + [9])
    lines = [f"{'parameter':<{w}}  {'initial':>10}  {'fitted':>10}  {'std error':>10}  bounds"]
    for i, p in enumerate(spec.parameters):
        se = result.std_error[p]
        se_text = f"{se:10.4g}" if math.isfinite(se) else f"{'-':>10}"
        lines.append(f"{p:<{w}}  {spec.initial[i]:10.4g}  {result.value[p]:10.4g}  {se_text}  "
                     f"[{spec.lower[i]:g}, {spec.upper[i]:g}]")
    for k, v in result.tied.items():
        other, ratio = spec.ratios[k]
        lines.append(f"{k:<{w}}  {'':>10}  {v:10.4g}  {'':>10}  tied: {ratio:g} x {other}")
    kinds = result.records["kind"].value_counts()
    lines.append(f"observations {result.n_obs} ({int(kinds.get('point', 0))} point, "
                 f"{int(kinds.get('glacier', 0))} glacier-wide); model evaluations {result.n_evaluations}; "
                 f"{result.elapsed_s:.1f} s")
    lines.append(f"RMSE {result.rmse_mwe:.3f} m w.e. (at the starting values {result.rmse_initial_mwe:.3f}); "
                 f"bias {result.bias_mwe:+.3f} m w.e. (modelled - observed)")
    lines += [f"warning: {w_}" for w_ in result.warnings]
    return "\n".join(lines)


def write_calibration(result: CalibrationResult, out_dir: str | Path, report: bool = True) -> list[Path]:
    """Write calibration.json, calibration_residuals.csv, calibration_fit.png and calibrated.toml,
    and with ``report`` (the default) calibration_report.html
    (:func:`firnline.documents.calibration_document`).

    All or nothing (staged); returns the written paths.
    """
    from ..outputs import staged, write_csv, write_json
    from ..report import fit_figure, save_png

    out_dir = Path(out_dir)
    text = calibrated_toml(result, out_dir)
    with staged(out_dir) as st:
        write_csv(st.path("calibration_residuals.csv"), result.records, float_format="%.10g")
        save_png(fit_figure(result), st.path("calibration_fit.png"), dpi=120)
        st.path("calibrated.toml").write_text(text, encoding="utf-8")
        if report:
            from ..documents import calibration_document
            from ..provenance import CAUTION
            fit = st.path("calibration_fit.png")
            files = list(st.names) + ["calibration_report.html", "calibration.json"]
            st.path("calibration_report.html").write_text(
                calibration_document(result, fit.read_bytes() if fit.exists() else None, files, CAUTION),
                encoding="utf-8")
        write_json(st.path("calibration.json"), dict(result.to_json(), files=list(st.names)
                                                     + ["calibration.json"]))
    return [out_dir / n for n in st.names]
