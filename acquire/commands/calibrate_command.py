"""``tapcurve calibrate``: the command that joins every way of calibrating.

Holds (:mod:`acquire.commands.calibrate`), filmed motion
(:mod:`acquire.commands.calibrate_motion`), the strip's memory
(:mod:`acquire.commands.calibrate_memory`) and force holds
(:mod:`acquire.commands.calibrate_force`) each fit their part; this module is
above them all and writes the calibration and its report picture.

Threads: main thread.
"""
from __future__ import annotations

import sys
from pathlib import Path
from typing import Sequence, TextIO

from acquire.commands.calibrate_run import fit_warnings, print_holds_report
from acquire.commands.common import _warn, write_text_output
from acquire.commands.report_figure import figure_path, report_svg
from acquire.core.holds import load_reference_table
from acquire.rig import load_rig
from acquire.store.outputs import check_output

__all__ = ["calibrate_command"]


def calibrate_command(
    *,
    files: Sequence[str],
    rig_path: str,
    out_path: str,
    reference_path: str | None = None,
    force: bool = False,
    motions: Sequence[tuple[str, str]] = (),
    static: bool = False,
    stdout: TextIO | None = None,
    stderr: TextIO | None = None,
) -> int:
    """``tapcurve calibrate [FILE...] --rig R --out CAL.json [--motion REC MARKERS]... [--reference TABLE] [--force]``.

    Prints the fit report to ``stdout`` and warnings to ``stderr``; writes
    the calibration and its report picture beside it (CAL.svg). Returns 0.

    Raises
    ------
    UserError
        See :func:`calibrate_files`; also an existing output without ``force``.
    """
    stdout = stdout or sys.stdout
    stderr = stderr or sys.stderr
    out = Path(out_path)
    rig = load_rig(rig_path)
    inputs = [Path(f) for f in files] + [Path(p) for m in motions for p in m] + [Path(rig_path)] + (
        [Path(reference_path)] if reference_path else [])
    check_output(out, option="--out", force=force, inputs=inputs, what="calibration", can_force=True)
    figure = check_output(figure_path(out), option="--out", force=force, inputs=inputs,
                          what="calibration report picture", can_force=True)
    table = load_reference_table(reference_path) if reference_path else None
    # the fits load scipy's signal and statistics (about 1.5 s): only once the arguments are known good
    from acquire.commands.calibrate_memory import print_memory_report
    from acquire.commands.calibrate_motion import calibrate_with_motion, print_calibration_report

    # holds only: calibrate_with_force (which adds the force model when there are force holds)
    run = calibrate_with_motion(files, motions, rig=rig, table=table, stdout=stdout, stderr=stderr, static=static)
    for note in run.notes:
        _warn(note, stderr)
    for w in fit_warnings(run.report):
        _warn(w, stderr)
    svg = report_svg(run)
    write_text_output(out, run.calibration.to_json(), replace=force)
    write_text_output(figure, svg, replace=force)
    if motions:
        print_calibration_report(run, out, stdout, figure=figure)
    else:
        print_holds_report(run, out, stdout)
        print(f"wrote {figure}", file=stdout)
    print_memory_report(run, stdout)
    return 0
