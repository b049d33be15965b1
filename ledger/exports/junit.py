"""JUnit XML export, so a CI job can gate on the verification matrix.

Layout (the JUnit XML structure that CI servers commonly read, junit-10.xsd)::

    <testsuites name tests failures errors time>
      <testsuite name="LOOP/REVISION" tests failures errors skipped time timestamp>
        <properties>
          <property name="caution" value="..."/>                 (first suite only)
          <property name="revision_hash LOOP/REVISION" value="..."/>
        </properties>
        <testcase classname="LOOP" name="REQUIREMENT-ID" time="0">
          <failure message="value ... does not meet limit ..." type="fail">...</failure>
          <failure message="stale, run verify" type="stale">...</failure>
          <error message="..." type="error">reason</error>
        </testcase>

One test case per (requirement, revision column); with the default selection (each loop's
tip) that is one per (requirement, loop).  ``pass`` has no child, ``fail`` a ``<failure>``
carrying value and limit, ``error`` an ``<error>`` with the reason.  ``stale`` and
``unverified`` are failures too (``type="stale"`` / ``"unverified"``), so that a gate turns
red after a plant or requirement change until ``verify`` has run; ``stale_as_skipped=True``
writes them as ``<skipped>`` instead (the older behaviour).  ``<testsuites>`` carries no
``skipped`` count (the schema has none there), and property names never repeat across suites
(some readers merge the properties of every suite into one table).
"""

from __future__ import annotations

from pathlib import Path

from ..text import xml_safe
from .rows import require, matrix_rows, number_text, write_xml

__all__ = ["export_junit", "junit_tree"]


def _value_text(r) -> str:
    """The value in the limit's unit (``ledger.display``)."""
    if r.value is None:
        return "no value"
    return r.value_shown


def _raw_text(r) -> str:
    unit = f" {r.unit}" if r.unit and r.unit not in ("bool", "ratio") else ""
    return f"{number_text(r.value, digits=17)}{unit}" if r.value is not None else "none"


def junit_tree(matrix, *, stale_as_skipped: bool = False):
    """The JUnit XML document as an lxml element tree.

    Parameters
    ----------
    matrix : ledger.history.matrix.Matrix
    stale_as_skipped : bool
        Write stale and unverified entries as ``<skipped>`` rather than ``<failure>``.
    """
    etree = require("lxml.etree")

    def sub(parent, tag, **attrs):  # stored text may hold anything: keep it XML (text.py)
        return etree.SubElement(parent, tag, {k: xml_safe(v) for k, v in attrs.items()})

    rows = matrix_rows(matrix)
    stamp = matrix.generated_at.replace(microsecond=0).isoformat()
    root = etree.Element("testsuites", name=xml_safe(matrix.title))
    totals = {"tests": 0, "failures": 0, "errors": 0}
    for i, col in enumerate(matrix.columns):
        mine = [r for r in rows if r.loop == col.loop and r.revision == col.label]
        suite = sub(root, "testsuite", name=f"{col.loop}/{col.label}", timestamp=stamp)
        props = sub(suite, "properties")
        if i == 0:
            sub(props, "property", name="caution", value=matrix.caution)
        sub(props, "property", name=f"revision_hash {col.loop}/{col.label}",
            value=col.content_hash)
        n = {"tests": 0, "failures": 0, "errors": 0, "skipped": 0}
        for r in mine:
            n["tests"] += 1
            case = sub(suite, "testcase", classname=r.loop, name=r.requirement, time="0")
            detail = (f"{r.requirement} v{r.version} ({r.metric}) on {r.loop}/{r.revision}: "
                      f"value {_value_text(r)}, limit {r.limit}, headroom "
                      f"{r.headroom_shown or 'none'}, worst variant "
                      f"{r.worst_variant or 'none'}; raw value {_raw_text(r)}")
            if r.verdict == "fail":
                n["failures"] += 1
                msg = (f"value {_value_text(r)} does not meet limit {r.limit}"
                       + (f" ({r.reason})" if r.reason else ""))
                f = sub(case, "failure", message=msg, type="fail")
                f.text = xml_safe(detail)
            elif r.verdict == "error":
                n["errors"] += 1
                e = sub(case, "error", message=r.reason or "could not be computed",
                        type="error")
                e.text = xml_safe(detail)
            elif r.verdict in ("stale", "unverified"):
                why = ("judged against an older requirement or plant version, or by another engine version"
                       if r.verdict == "stale" else "never verified against this requirement")
                if stale_as_skipped:
                    n["skipped"] += 1
                    sub(case, "skipped", message=f"{r.verdict}, run verify")
                else:
                    n["failures"] += 1
                    f = sub(case, "failure", message=f"{r.verdict}, run verify",
                            type=r.verdict)
                    f.text = xml_safe(f"{detail} ({why})")
        for k, v in n.items():
            suite.set(k, str(v))
            if k in totals:
                totals[k] += v
        suite.set("time", "0")
    for k, v in totals.items():
        root.set(k, str(v))
    root.set("time", "0")
    root.addprevious(etree.Comment(" " + " ".join(matrix.caution.split()) + " "))
    return etree.ElementTree(root)


def export_junit(matrix, path, *, stale_as_skipped: bool = False) -> Path:
    """Write the matrix as JUnit XML (UTF-8).

    Parameters
    ----------
    matrix : ledger.history.matrix.Matrix
    path : str or Path
    stale_as_skipped : bool
        Write stale and unverified entries as ``<skipped>`` (the older behaviour) instead of
        failures ``stale, run verify`` / ``unverified, run verify`` (the default, so that a CI
        gate fails until the matrix is verified again).

    Returns
    -------
    Path
    """
    tree = junit_tree(matrix, stale_as_skipped=stale_as_skipped)
    return write_xml(tree, path)
