"""The three verdicts every health judgement gives: one definition for wiring, actuation and drift.

Pure constants; any thread.
"""
from __future__ import annotations

__all__ = ["OK", "WARN", "FAULT", "VERDICTS", "RANK"]

OK, WARN, FAULT = "ok", "warn", "fault"
VERDICTS = (OK, WARN, FAULT)
#: worse verdicts rank higher (the worst of a row decides the row)
RANK = {OK: 0, WARN: 1, FAULT: 2}
