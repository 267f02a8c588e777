"""The products of a tuning run: ``tuning.ecsv``, ``efficiency.png``, ``recommended.yaml`` and the summary.

* ``tuning.ecsv`` (astropy ECSV): one row per class × window × FAP threshold, with the
  slides' false matches per event (and their bootstrap error), the model's expectation
  for the same threshold, and the injections' efficiency (and its bootstrap error);
  ``at_target`` marks each window's threshold at the target, ``recommended`` the chosen
  window. The header's ``meta`` holds the run's inputs and each class's summary. It
  depends on nothing but the inputs and the seed (no times, no absolute paths), so the
  same seed gives the same bytes.
* ``efficiency.png``: per class, efficiency against false matches per event, one curve
  per window, the target and the recommended point marked; beside it, the calibration
  of the configured window: slides against the model for each FAP threshold.
* ``recommended.yaml``: a ``classes:`` section to paste, with each tuned class's
  recommended window and its other fields as configured, and comments that say what
  was measured.
"""

from __future__ import annotations

import math
from pathlib import Path

import numpy as np

from matcher import __version__
from matcher.tune.run import ClassData, TuneResult
from matcher.tune.scan import ClassScan

__all__ = ["summary", "tuning_table", "write_ecsv", "write_plot", "recommended_yaml", "write_outputs", "format_window"]


def _f(x) -> float | None:
    x = float(x)
    return x if math.isfinite(x) else None


def format_window(lo: float, hi: float) -> str:
    """``[0 s, 3 d]``-style label with a unit that suits the window's length."""
    span = max(abs(lo), abs(hi))
    for unit, size in (("d", 86400.0), ("h", 3600.0), ("min", 60.0)):
        if span >= 2 * size:
            return f"[{lo / size:g}, {hi / size:.4g}] {unit}"
    return f"[{lo:g}, {hi:.4g}] s"


def _class_summary(cd: ClassData, scan: ClassScan) -> dict:
    r = cd.rate
    rec = scan.recommended
    mc = scan.model_check
    conf = cd.configured
    ti_conf = int(scan.target_index[conf])
    out = {
        "measured_rate_per_deg2_per_day": _f(r.rate_per_deg2_per_day),
        "measured_rate_err_per_deg2_per_day": _f(r.err_per_deg2_per_day),
        "configured_rate_per_deg2_per_day": r.configured_per_deg2_per_day,
        "rate_ratio_to_configured": _f(r.ratio_to_configured),
        "reports": r.reports,
        "footprint_deg2": _f(r.footprint_deg2),
        "footprint_order": cd.footprint.order,
        "footprint_all_sky": bool(cd.footprint.all_sky),
        "footprint_method": cd.footprint.method,
        "live_days": _f(r.live_days),
        "outages": int(cd.live.segments - 1),
        "recommended_window_s": None if rec < 0 else [float(x) for x in scan.windows_s[rec]],
        "efficiency": None if rec < 0 else _f(scan.efficiency_at_target[rec]),
        "efficiency_err": None if rec < 0 else _f(scan.efficiency_err_at_target),
        "false_per_event": None if rec < 0 else _f(scan.false_per_event[rec, scan.target_index[rec]]),
        "fap_threshold": None if rec < 0 else _f(scan.fap_thresholds[scan.target_index[rec]]),
        "recommended_window_bootstrap": {
            "chosen_fraction": None if rec < 0 else _f(scan.window_choice_fraction[rec]),
            "lo_s_16_84": [_f(x) for x in scan.window_lo_range_s],
            "hi_s_16_84": [_f(x) for x in scan.window_hi_range_s],
        },
        "configured_window_s": [float(x) for x in scan.windows_s[conf]],
        "configured_window_efficiency": _f(scan.efficiency_at_target[conf]),
        "configured_window_fap_threshold": None if ti_conf < 0 else _f(scan.fap_thresholds[ti_conf]),
        "target_false_per_event": scan.target,
        "model_check": {
            "verdict": mc.verdict,
            "fap_threshold": _f(mc.fap_threshold),
            "slides_false_per_event": _f(mc.slides_false_per_event),
            "model_false_per_event": _f(mc.model_false_per_event),
            "ratio": _f(mc.ratio),
            "excess_sigma": _f(mc.z),
            "slide_overlap": _f(mc.overlap),
            "dispersion": _f(mc.dispersion),
        },
        "model_underestimates": mc.verdict == "underestimates",
        "alerts": scan.alerts,
        "slides": scan.slides,
        "slides_requested": cd.slides.requested,
        "slide_offsets_s": [_f(cd.slides.offsets_s.min()), _f(cd.slides.offsets_s.max())]
        if cd.slides.offsets_s.size else [],
        "injections": scan.total_injections,
        "observed_fraction": _f(scan.observed / scan.total_injections) if scan.total_injections else None,
        "delay_model": cd.delay.describe(),
        "windows_scanned": len(cd.windows_s),
        "notes": list(cd.notes),
    }
    return out


def summary(result: TuneResult) -> dict:
    """The run summary (the ``--json`` output): inputs, and per class the measurement and the recommendation."""
    plan = result.plan
    a = plan.archive
    s = plan.settings
    return {
        "archive": a.path.name,
        "archive_sha256": a.sha256,
        "alerts": len(a.alerts),
        "reports": len(a.reports),
        "lines_rejected": len(a.rejected),
        "seed": plan.seed,
        "target_false_per_event": s.target_false_per_event,
        "injections_per_alert": s.injections,
        "slides_per_alert": s.slides,
        "bootstrap": s.bootstrap,
        "fap_thresholds": [float(x) for x in plan.fap_thresholds],
        "classes": {cd.name: _class_summary(cd, scan) for cd, scan in zip(plan.classes, result.scans)},
        "warnings": list(result.warnings),
    }


def tuning_table(result: TuneResult):
    """The ``tuning.ecsv`` table (astropy ``Table``)."""
    import astropy.units as u
    from astropy.table import Table

    cols: dict[str, list] = {k: [] for k in (
        "class", "window_lo_s", "window_hi_s", "configured", "recommended", "at_target", "fap_threshold",
        "model_false_per_event", "model_fap", "false_per_event", "false_per_event_err", "false_event_fraction",
        "n_false", "n_slid_events", "efficiency", "efficiency_err", "n_found", "n_injections")}
    for cd, sc in zip(result.plan.classes, result.scans):
        J, I = sc.false_per_event.shape
        for j in range(J):
            for i in range(I):
                cols["class"].append(cd.name)
                cols["window_lo_s"].append(float(sc.windows_s[j, 0]))
                cols["window_hi_s"].append(float(sc.windows_s[j, 1]))
                cols["configured"].append(j == sc.configured)
                cols["recommended"].append(j == sc.recommended)
                cols["at_target"].append(i == int(sc.target_index[j]))
                cols["fap_threshold"].append(float(sc.fap_thresholds[i]))
                m = float(sc.model_false_per_event[j, i])
                cols["model_false_per_event"].append(m)
                cols["model_fap"].append(float(-math.expm1(-m)))
                cols["false_per_event"].append(float(sc.false_per_event[j, i]))
                cols["false_per_event_err"].append(float(sc.false_per_event_err[j, i]))
                cols["false_event_fraction"].append(float(sc.false_event_fraction[j, i]))
                cols["n_false"].append(int(sc.matches[j, i]))
                cols["n_slid_events"].append(int(sc.slid_events))
                cols["efficiency"].append(float(sc.efficiency[j, i]))
                cols["efficiency_err"].append(float(sc.efficiency_err[j, i]))
                cols["n_found"].append(int(sc.found[j, i]))
                cols["n_injections"].append(int(sc.total_injections))
    t = Table(cols)
    t["window_lo_s"].unit = u.s
    t["window_hi_s"].unit = u.s
    desc = {
        "window_lo_s": "start of the window scanned (onset minus merger time)",
        "window_hi_s": "end of the window scanned",
        "configured": "this is the configured window",
        "recommended": "this is the recommended window",
        "at_target": "largest FAP threshold whose slide false matches per event do not exceed the target",
        "fap_threshold": "a match counts when its FAP is at most this",
        "model_false_per_event": "false matches per event the model (configured rate) expects at this threshold",
        "model_fap": "1 - exp(-model_false_per_event): the model's chance of at least one per event",
        "false_per_event": "false matches per slid event in the time slides",
        "false_per_event_err": "bootstrap (over alerts) standard deviation of false_per_event",
        "false_event_fraction": "fraction of slid events with at least one false match",
        "n_false": "false matches counted over all slides and alerts",
        "n_slid_events": "alerts times slides",
        "efficiency": "fraction of injections found (observed, in the window, FAP at most the threshold)",
        "efficiency_err": "bootstrap (over alerts) standard deviation of efficiency",
        "n_found": "injections found",
        "n_injections": "injections drawn (observed or not)",
    }
    for k, v in desc.items():
        t[k].description = v
    summ = summary(result)
    t.meta["tool"] = f"matcher tune {__version__}"
    for k in ("archive", "archive_sha256", "alerts", "reports", "lines_rejected", "seed", "target_false_per_event",
              "injections_per_alert", "slides_per_alert", "bootstrap"):
        t.meta[k] = summ[k]
    t.meta["classes"] = summ["classes"]
    t.meta["warnings"] = summ["warnings"]
    return t


def write_ecsv(result: TuneResult, path) -> Path:
    p = Path(path)
    tuning_table(result).write(p, format="ascii.ecsv", overwrite=True)
    return p


def _plot_class(ax_eff, ax_cal, cd: ClassData, sc: ClassScan) -> None:
    from matcher.report import palette as pal

    if sc.slid_events == 0:
        for ax in (ax_eff, ax_cal):
            ax.text(0.5, 0.5, f"{cd.name}: no time slide fits in the archive\n({cd.slides.reason})",
                    ha="center", va="center", wrap=True, fontsize=9, transform=ax.transAxes)
            ax.set_axis_off()
        return
    J = sc.windows_s.shape[0]
    lengths = sc.windows_s[:, 1] - sc.windows_s[:, 0]
    order = np.argsort(lengths, kind="stable")
    # Colours from the project's sequential map (pale = short, dark = long), skipping its
    # palest end so every curve reads on white; line styles tell neighbours apart.
    shades = np.linspace(0.28, 1.0, max(J, 2))
    styles = ["-", "--", "-.", ":"]
    floor = 0.5 / max(sc.slid_events, 1)
    for rank, j in enumerate(order):
        x = np.maximum(sc.false_per_event[j], floor)
        y = sc.efficiency[j]
        label = format_window(*sc.windows_s[j]) + (" (configured)" if j == sc.configured else "")
        ax_eff.plot(x, y, color=pal.SKY_CMAP(shades[rank]), linestyle=styles[rank % 4],
                    linewidth=2.2 if j == sc.recommended else 1.3, label=label)
    ax_eff.axvline(sc.target, color=pal.INK, linestyle=":", linewidth=1.0)
    ax_eff.annotate(f"target {sc.target:g}", (sc.target, 0.0), xycoords=("data", "axes fraction"),
                    xytext=(3, 4), textcoords="offset points", fontsize=8, color=pal.INK)
    if sc.recommended >= 0:
        j = sc.recommended
        i = int(sc.target_index[j])
        c = pal.CANDIDATE
        ax_eff.scatter([max(sc.false_per_event[j, i], floor)], [sc.efficiency[j, i]], marker=c["marker"],
                       s=c["size"], facecolor=c["face"], edgecolor=c["edge"], zorder=5,
                       label=f"recommended: {format_window(*sc.windows_s[j])}\nefficiency "
                             f"{sc.efficiency[j, i]:.2f} ± {sc.efficiency_err_at_target:.2f}")
    top = float(np.nanmax(sc.efficiency)) if np.isfinite(sc.efficiency).any() else 1.0
    ax_eff.set_xscale("log")
    ax_eff.set_ylim(-0.01, min(1.02, 1.15 * top + 0.03))
    ax_eff.set_xlabel(f"false matches per event (time slides; none seen is drawn at {floor:.1g})")
    ax_eff.set_ylabel("efficiency (fraction of injections found)")
    ax_eff.set_title(f"{cd.name}: {sc.alerts} alerts × {sc.slides} slides, {sc.injections} injections each",
                     fontsize=10, loc="left")
    ax_eff.grid(True, which="both", alpha=0.25)

    j = sc.configured
    f = sc.fap_thresholds
    one = 1.0 / max(sc.slid_events, 1)
    emp = sc.false_per_event[j]
    err = sc.false_per_event_err[j]
    seen = emp > 0
    ax_cal.plot(f, np.where(seen, emp, np.nan), color=pal.SKY_CMAP(0.75), linewidth=1.8, marker=".",
                label="time slides (± bootstrap)")
    ax_cal.fill_between(f, np.where(seen, np.maximum(emp - err, 0.5 * one), np.nan), np.where(seen, emp + err, np.nan),
                        color=pal.SKY_CMAP(0.45), alpha=0.35, linewidth=0)
    ax_cal.plot(f, sc.model_false_per_event[j], color=pal.INK, linestyle="--", linewidth=1.3,
                label="model (configured rate)")
    ax_cal.axhline(one, color=pal.FOOTPRINT["color"], linestyle=":", linewidth=1.0,
                   label=f"one match in all {sc.slid_events} slid events")
    ax_cal.set_xscale("log")
    ax_cal.set_yscale("log")
    ax_cal.set_xlabel("FAP threshold (model false-association probability)")
    ax_cal.set_ylabel("false matches per event")
    mc = sc.model_check
    ax_cal.set_title(f"configured window {format_window(*sc.windows_s[j])}: model {mc.verdict}", fontsize=10,
                     loc="left")
    ax_cal.grid(True, which="both", alpha=0.25)
    ax_cal.legend(fontsize=7, loc="upper left", framealpha=0.9)


def write_plot(result: TuneResult, path) -> Path:
    """``efficiency.png``: a row per class (efficiency curves, and the calibration of the configured window)."""
    from matplotlib.backends.backend_agg import FigureCanvasAgg
    from matplotlib.figure import Figure

    n = len(result.scans)
    height = 4.6 * n
    fig = Figure(figsize=(14.0, height), dpi=110)
    FigureCanvasAgg(fig)
    # A fixed layout (in inches), room on the right of each efficiency panel for its legend.
    fig.subplots_adjust(left=0.055, right=0.985, bottom=0.75 / height, top=1 - 0.45 / height,
                        hspace=1.25 / 4.6, wspace=0.3)
    axes = fig.subplots(n, 3, squeeze=False, width_ratios=[1.5, 0.62, 1.0])
    for (ax_eff, ax_key, ax_cal), cd, sc in zip(axes, result.plan.classes, result.scans):
        _plot_class(ax_eff, ax_cal, cd, sc)
        ax_key.axis("off")
        handles, labels = ax_eff.get_legend_handles_labels()
        ax_key.legend(handles, labels, fontsize=7, loc="center left", frameon=False, borderaxespad=0.0)
    p = Path(path)
    fig.savefig(p, format="png", metadata={"Software": f"matcher tune {__version__}"})
    return p


def _num(x: float):
    x = float(x)
    return int(x) if x.is_integer() and abs(x) < 1e15 else x


def recommended_yaml(result: TuneResult) -> str:
    """The ``classes:`` section to paste: recommended windows, the other fields as configured."""
    import yaml

    a = result.plan.archive
    lines = [
        f"# Recommended by matcher tune {__version__} from {a.path.name} (sha256 {a.sha256[:16]}…),",
        f"# {len(a.alerts)} alerts, seed {result.plan.seed}, target "
        f"{result.plan.settings.target_false_per_event:g} false matches per event (time slides).",
        "# Paste under (or in place of) the classes: section of your configuration; only the windows changed.",
    ]
    body = {}
    for cd, sc in zip(result.plan.classes, result.scans):
        k = cd.klass
        r = cd.rate
        rec = sc.recommended
        if rec < 0:
            why = (cd.slides.reason if sc.slid_events == 0 else
                   f"no window holds {sc.target:g} false matches per event within the FAP grid")
            lines.append(f"# {cd.name}: no recommendation ({why}); kept as configured.")
            lo, hi = k.window_lo_s, k.window_hi_s
        else:
            lo, hi = sc.windows_s[rec]
            i = int(sc.target_index[rec])
            lines.append(f"# {cd.name}: window {format_window(lo, hi)}: efficiency {sc.efficiency[rec, i]:.3f} ± "
                         f"{sc.efficiency_err_at_target:.3f} at FAP <= {sc.fap_thresholds[i]:.3g} "
                         f"({sc.false_per_event[rec, i]:.3g} false matches per event); configured "
                         f"{format_window(k.window_lo_s, k.window_hi_s)}: {sc.efficiency_at_target[sc.configured]:.3f}.")
        lines.append(f"#   background measured {r.rate_per_deg2_per_day:.4g} ± {r.err_per_deg2_per_day:.2g} per deg² "
                     f"per day over {r.footprint_deg2:,.0f} deg² and {r.live_days:.4g} d (configured "
                     f"{r.configured_per_deg2_per_day:.4g}; model check: {sc.model_check.verdict}).")
        entry = {}
        if k.description:
            entry["description"] = k.description
        entry["window_s"] = [_num(lo), _num(hi)]
        entry["rate_per_deg2_per_day"] = _num(k.rate_per_deg2_per_day)
        entry["efficiency"] = _num(k.efficiency)
        entry["needs_neutron_star"] = bool(k.needs_neutron_star)
        entry["reach_mpc"] = _num(k.reach_mpc)
        entry["pos_err_deg"] = _num(k.pos_err_deg)
        entry["sharp_time"] = bool(k.sharp_time)
        if k.cadence_s is not None:
            entry["cadence_s"] = _num(k.cadence_s)
        entry["background_distance"] = k.background_distance
        body[cd.name] = entry
    text = yaml.safe_dump({"classes": body}, sort_keys=False, default_flow_style=None, allow_unicode=True)
    return "\n".join(lines) + "\n" + text


def write_outputs(result: TuneResult, out_dir) -> dict[str, Path]:
    """Write the three files into ``out_dir`` (created if needed); returns their paths."""
    d = Path(out_dir)
    d.mkdir(parents=True, exist_ok=True)
    paths = {
        "tuning_ecsv": write_ecsv(result, d / "tuning.ecsv"),
        "efficiency_png": write_plot(result, d / "efficiency.png"),
        "recommended_yaml": d / "recommended.yaml",
    }
    paths["recommended_yaml"].write_text(recommended_yaml(result), encoding="utf-8")
    return paths
