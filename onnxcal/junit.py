"""verify's checks as JUnit XML, the report CI systems read (split out of :mod:`onnxcal.verify`)."""

from __future__ import annotations

import xml.etree.ElementTree as ET
from datetime import UTC, datetime

from .verify import Check, VerifyResult, format_figure


def _line(c: Check) -> str:
    return f"{c.name}: {c.status}, value {format_figure(c.value)}, limit {format_figure(c.limit)}: {c.detail}"


def junit_xml(result: VerifyResult, *, suite: str, elapsed: float = 0.0) -> bytes:
    """The checks as JUnit XML: one ``testcase`` per check, in one ``testsuite``.

    A failed check carries a ``failure`` element, a skipped one a
    ``skipped`` element; each has its figure in ``system-out``. The layout
    (``testsuites`` > ``testsuite`` > ``testcase`` > ``failure`` /
    ``skipped`` / ``system-out``, with ``tests``, ``failures``, ``errors``,
    ``skipped`` and ``time`` counts) is the one CI systems read (common
    practice; there is no single published schema).
    """
    checks = result.checks
    counts = {
        "tests": str(len(checks)),
        "failures": str(len(result.failed)),
        "errors": "0",
        "skipped": str(sum(c.skipped or c.undecided for c in checks)),
        "time": f"{elapsed:.3f}",
    }
    root = ET.Element("testsuites", {"name": "onnxcal verify", **counts})
    stamp = datetime.now(UTC).replace(microsecond=0).isoformat()
    ts = ET.SubElement(root, "testsuite", {"name": suite, **counts, "timestamp": stamp})
    props = ET.SubElement(ts, "properties")
    for key, value in (("samples", result.n), ("reference_from", result.reference_from), ("original", result.original)):
        ET.SubElement(props, "property", {"name": key, "value": str(value)})
    for c in checks:
        case = ET.SubElement(ts, "testcase", {"classname": suite, "name": c.name, "time": "0"})
        if c.skipped or c.undecided:
            ET.SubElement(case, "skipped", {"message": c.detail})
        elif not c.passed:
            fail = ET.SubElement(case, "failure", {"message": _line(c), "type": "check failed"})
            fail.text = _line(c)
        ET.SubElement(case, "system-out").text = _line(c)
    if result.notes:
        ET.SubElement(ts, "system-out").text = "\n".join(result.notes)
    ET.indent(root)
    return ('<?xml version="1.0" encoding="UTF-8"?>\n' + ET.tostring(root, encoding="unicode") + "\n").encode()
