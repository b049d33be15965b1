"""ReqIF 1.2 export of the matrix's requirements (OMG Requirements Interchange Format).

Namespace ``http://www.omg.org/spec/ReqIF/20110401/reqif.xsd``.  Content:

* one string datatype;
* one SPEC-OBJECT-TYPE ``Control requirement`` with string attributes ID, Title, Statement,
  Rationale, Method, Status, Metric, Limit, Version, Latest verdict;
* one SPEC-OBJECT per requirement (needs without a metric included);
* one SPEC-RELATION per trace, type ``derives_from``, SOURCE = the derived requirement,
  TARGET = the requirement it derives from;
* one SPECIFICATION whose hierarchy nests each requirement under its first parent (roots at
  the top); further parents are carried by the relations.

Identifiers are deterministic (a prefix, the sanitised ID and a short SHA-256 of the ID), so
exporting the same ledger twice gives the same identifiers and a re-import updates in place.
"""

from __future__ import annotations

import hashlib
import re
from pathlib import Path

from ..text import xml_safe
from .rows import require, matrix_rows, write_xml

__all__ = ["REQIF_NS", "export_reqif", "reqif_tree", "reqif_identifier", "REQIF_ATTRIBUTES"]

REQIF_NS = "http://www.omg.org/spec/ReqIF/20110401/reqif.xsd"

#: Attribute long names, in order, with the RequirementInfo field (or a computed one).
REQIF_ATTRIBUTES = ("ID", "Title", "Statement", "Rationale", "Method", "Status", "Metric",
                    "Limit", "Version", "Latest verdict")

_UNSAFE = re.compile(r"[^A-Za-z0-9_.-]")


def reqif_identifier(kind: str, name: str) -> str:
    """Deterministic XML ID (an NCName) for a record of ``kind`` called ``name``."""
    digest = hashlib.sha256(f"{kind}\x00{name}".encode()).hexdigest()[:10]
    return f"_{kind}-{_UNSAFE.sub('_', name)}-{digest}"


def _stamp(dt) -> str:
    return dt.replace(microsecond=0).isoformat()


def _state_text(r) -> str:
    """``loop/revision: verdict``, or for a waived cell the waiver with its approver, role,
    reason and until when."""
    if r.state != "waived":
        return f"{r.loop}/{r.revision}: {r.verdict}"
    until = ", ".join(x for x in (f"until {r.waiver_expires}" if r.waiver_expires else "",
                                  r.waiver_condition) if x) or "no expiry"
    return (f"{r.loop}/{r.revision}: waived ({r.verdict} accepted by waiver {r.waiver}, "
            f"{r.waiver_approver} ({r.waiver_role}): {r.waiver_reason}; {until})")


def reqif_tree(matrix):
    """The ReqIF document as an lxml element tree."""
    etree = require("lxml.etree")

    N = "{%s}" % REQIF_NS

    def el(parent, tag, text=None, **attrs):
        # stored text may hold anything: keep it XML (ledger/text.py)
        e = etree.SubElement(parent, N + tag, {k.replace("_", "-").upper(): xml_safe(v)
                                                for k, v in attrs.items()})
        if text is not None:
            e.text = xml_safe(text)
        return e

    def ref(parent, wrapper, tag, target):
        el(el(parent, wrapper), tag, target)

    created = _stamp(matrix.generated_at)
    reqs = sorted(matrix.requirements, key=lambda q: q.key)
    keys = {q.key for q in reqs}
    rows = matrix_rows(matrix)
    latest = {q.key: "; ".join(_state_text(r) for r in rows if r.requirement == q.key)
              for q in reqs}

    root = etree.Element(N + "REQ-IF", nsmap={None: REQIF_NS})
    root.addprevious(etree.Comment(" " + " ".join(matrix.caution.split()) + " "))
    head = el(el(root, "THE-HEADER"), "REQ-IF-HEADER",
              identifier=reqif_identifier("header", matrix.title))
    el(head, "COMMENT", matrix.caution)
    el(head, "CREATION-TIME", created)
    el(head, "REQ-IF-TOOL-ID", "loopledger")
    el(head, "REQ-IF-VERSION", "1.0")
    el(head, "SOURCE-TOOL-ID", "loopledger")
    el(head, "TITLE", matrix.title)

    content = el(el(root, "CORE-CONTENT"), "REQ-IF-CONTENT")
    dt_id = reqif_identifier("datatype", "text")
    el(el(content, "DATATYPES"), "DATATYPE-DEFINITION-STRING", identifier=dt_id,
       last_change=created, long_name="Text", max_length="100000")
    types = el(content, "SPEC-TYPES")
    ot_id = reqif_identifier("objtype", "requirement")
    ot = el(types, "SPEC-OBJECT-TYPE", identifier=ot_id, last_change=created,
            long_name="Control requirement")
    attrs = el(ot, "SPEC-ATTRIBUTES")
    attr_ids = {}
    for name in REQIF_ATTRIBUTES:
        attr_ids[name] = reqif_identifier("attr", name)
        a = el(attrs, "ATTRIBUTE-DEFINITION-STRING", identifier=attr_ids[name],
               last_change=created, long_name=name)
        ref(a, "TYPE", "DATATYPE-DEFINITION-STRING-REF", dt_id)
    rt_id = reqif_identifier("reltype", "derives_from")
    el(types, "SPEC-RELATION-TYPE", identifier=rt_id, last_change=created,
       long_name="derives_from")
    st_id = reqif_identifier("spectype", "requirements")
    el(types, "SPECIFICATION-TYPE", identifier=st_id, last_change=created,
       long_name="Requirements specification")

    objects = el(content, "SPEC-OBJECTS")
    obj_id = {}
    for q in reqs:
        obj_id[q.key] = reqif_identifier("req", q.key)
        o = el(objects, "SPEC-OBJECT", identifier=obj_id[q.key], last_change=_stamp(q.created_at),
               long_name=q.key)
        ref(o, "TYPE", "SPEC-OBJECT-TYPE-REF", ot_id)
        values = el(o, "VALUES")
        data = {"ID": q.key, "Title": q.title, "Statement": q.statement,
                "Rationale": q.rationale, "Method": q.method, "Status": q.status,
                "Metric": q.metric or "", "Limit": q.limit_text, "Version": str(q.version),
                "Latest verdict": latest[q.key] or "no metric (verified through derived "
                                                   "requirements)"}
        for name in REQIF_ATTRIBUTES:
            v = el(values, "ATTRIBUTE-VALUE-STRING", the_value=data[name] or "")
            ref(v, "DEFINITION", "ATTRIBUTE-DEFINITION-STRING-REF", attr_ids[name])

    relations = el(content, "SPEC-RELATIONS")
    for q in reqs:
        for parent in q.parents:
            if parent not in keys:
                continue
            r = el(relations, "SPEC-RELATION",
                   identifier=reqif_identifier("rel", f"{q.key}->{parent}"),
                   last_change=_stamp(q.created_at), long_name=f"{q.key} derives from {parent}")
            ref(r, "TYPE", "SPEC-RELATION-TYPE-REF", rt_id)
            ref(r, "SOURCE", "SPEC-OBJECT-REF", obj_id[q.key])
            ref(r, "TARGET", "SPEC-OBJECT-REF", obj_id[parent])

    spec = el(el(content, "SPECIFICATIONS"), "SPECIFICATION",
              identifier=reqif_identifier("spec", matrix.title), last_change=created,
              long_name=matrix.title)
    ref(spec, "TYPE", "SPECIFICATION-TYPE-REF", st_id)
    children: dict[str | None, list] = {}
    for q in reqs:
        first = next((p for p in q.parents if p in keys), None)
        children.setdefault(first, []).append(q)

    def nest(parent_el, key, depth=0):
        kids = children.get(key, [])
        if not kids:
            return
        box = el(parent_el, "CHILDREN")
        for q in kids:
            h = el(box, "SPEC-HIERARCHY", identifier=reqif_identifier("node", q.key),
                   last_change=_stamp(q.created_at))
            ref(h, "OBJECT", "SPEC-OBJECT-REF", obj_id[q.key])
            nest(h, q.key, depth + 1)

    nest(spec, None)
    return etree.ElementTree(root)


def export_reqif(matrix, path) -> Path:
    """Write the matrix's requirements and traces as a ReqIF 1.2 file (UTF-8).

    Parameters
    ----------
    matrix : ledger.history.matrix.Matrix
    path : str or Path

    Returns
    -------
    Path
    """
    tree = reqif_tree(matrix)
    return write_xml(tree, path)
