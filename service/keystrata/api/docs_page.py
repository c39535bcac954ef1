"""The API documentation page: one self-contained HTML document drawn from the node's
OpenAPI document and its route table.

Routes are grouped by tag; each shows its method and path, the roles it admits (read from
the identity dependency, as the role tests do), its summary and description, its
parameters, its request body and its answers; the schemas the document names are drawn
once, at the end, as tables of members, and linked from where they are used. No script,
no external file, no font or image: one inline style sheet, whose SHA-256 the page's
Content-Security-Policy names (CSP Level 3, section 8.4, hash-source), so nothing else
may style or run in it. Every text from the document is HTML-escaped.
"""

from __future__ import annotations

import base64
import hashlib
import html
from collections.abc import Iterable, Mapping
from dataclasses import dataclass
from typing import Any

_STYLE = """
body{font:15px/1.45 system-ui,sans-serif;margin:0 auto;max-width:68rem;padding:0 1rem 3rem;
color:#1d232a;background:#fbfbfa}
h1{font-size:1.5rem;margin:1.2rem 0 .2rem}h2{font-size:1.25rem;margin:2rem 0 .5rem;
border-bottom:1px solid #c9ced3}h3{font-size:1rem;margin:0}
header p,.meta{color:#505a64;margin:.2rem 0}
nav ul{columns:3;padding-left:1.2rem}
.op{border:1px solid #d6dade;border-radius:4px;margin:.8rem 0;padding:.6rem .8rem;
background:#fff}
.m{display:inline-block;min-width:4.2rem;font-weight:700;font-family:monospace}
.GET{color:#1f6f43}.POST{color:#1d4f91}.PATCH{color:#8a5a00}.DELETE{color:#a12a2a}
code{font-family:ui-monospace,monospace;font-size:.92em}
table{border-collapse:collapse;margin:.4rem 0;width:100%}
th,td{border-top:1px solid #e3e6e9;padding:.2rem .45rem;text-align:left;vertical-align:top}
th{font-weight:600;color:#38414a}td.t{font-family:ui-monospace,monospace;font-size:.9em}
.roles{font-weight:600}.off{color:#505a64;font-style:italic}
"""
#: The hash-source of the inline style sheet (CSP Level 3, section 8.4).
STYLE_HASH = "sha256-" + base64.b64encode(hashlib.sha256(_STYLE.encode()).digest()).decode()
#: Nothing loads, runs or frames; only the style sheet above applies.
CONTENT_SECURITY_POLICY = (
    f"default-src 'none'; style-src '{STYLE_HASH}'; base-uri 'none'; "
    "form-action 'none'; frame-ancestors 'none'"
)
_METHOD_ORDER = ("GET", "POST", "PUT", "PATCH", "DELETE")
_LIMITS = (
    ("minimum", "≥ {}"),
    ("exclusiveMinimum", "> {}"),
    ("maximum", "≤ {}"),
    ("exclusiveMaximum", "< {}"),
    ("minLength", "{} or more characters"),
    ("maxLength", "at most {} characters"),
    ("minItems", "{} or more items"),
    ("maxItems", "at most {} items"),
    ("pattern", "matching {}"),
    ("format", "format {}"),
)


@dataclass(frozen=True)
class RouteFacts:
    """What the page needs of one route besides the document: where it is, who may call
    it, and whether the document describes it."""

    path: str
    methods: tuple[str, ...]
    tag: str
    summary: str
    roles: tuple[str, ...]
    in_document: bool


def _e(text: object) -> str:
    return html.escape(str(text), quote=True)


def _anchor(kind: str, name: str) -> str:
    return kind + "-" + "".join(c if c.isalnum() else "-" for c in name)


def _ref_name(ref: str) -> str:
    return ref.rsplit("/", 1)[-1]


def type_html(schema: Mapping[str, Any]) -> str:
    """Return a short HTML rendering of a JSON Schema's type (links for references)."""
    if "$ref" in schema:
        name = _ref_name(str(schema["$ref"]))
        return f'<a href="#{_anchor("schema", name)}">{_e(name)}</a>'
    for combiner in ("anyOf", "oneOf"):
        if combiner in schema:
            parts = [type_html(s) for s in schema[combiner]]
            return " or ".join(dict.fromkeys(parts))
    if "allOf" in schema:
        return " and ".join(type_html(s) for s in schema["allOf"])
    if "const" in schema:
        return f"<code>{_e(_json_text(schema['const']))}</code>"
    if "enum" in schema:
        return "one of " + ", ".join(f"<code>{_e(_json_text(v))}</code>" for v in schema["enum"])
    kind = schema.get("type")
    if isinstance(kind, list):
        text = " or ".join(_e(k) for k in kind)
    elif kind == "array":
        items = schema.get("items")
        text = "list of " + (type_html(items) if isinstance(items, Mapping) else "anything")
    elif kind == "object" or "properties" in schema:
        extra = schema.get("additionalProperties")
        text = "object of " + type_html(extra) if isinstance(extra, Mapping) and extra else "object"
    elif kind is None:
        text = "anything"
    else:
        text = _e(kind)
    limits = [fmt.format(_e(schema[key])) for key, fmt in _LIMITS if key in schema]
    return text + (f" ({'; '.join(limits)})" if limits else "")


def _json_text(value: object) -> str:
    if value is None:
        return "null"
    if isinstance(value, bool):
        return "true" if value else "false"
    if isinstance(value, str):
        return f'"{value}"'
    return str(value)


def _members(schema: Mapping[str, Any]) -> str:
    """A table of an object schema's members (nested inline objects drawn inside)."""
    props: Mapping[str, Any] = schema.get("properties") or {}
    if not props:
        return ""
    required = set(schema.get("required") or ())
    rows = []
    for name, sub in props.items():
        nested = _members(sub) if "properties" in sub and "$ref" not in sub else ""
        description = _e(sub.get("description", ""))
        rows.append(
            f"<tr><td><code>{_e(name)}</code></td><td class=t>{type_html(sub)}</td>"
            f"<td>{'required' if name in required else 'optional'}</td>"
            f"<td>{description}{nested}</td></tr>"
        )
    closed = schema.get("additionalProperties") is False
    note = "" if closed else "<p class=meta>Other members are allowed.</p>"
    return (
        "<table><tr><th>member</th><th>type</th><th></th><th>meaning</th></tr>"
        + "".join(rows)
        + "</table>"
        + note
    )


def _parameters(op: Mapping[str, Any]) -> str:
    params = op.get("parameters") or []
    if not params:
        return ""
    rows = "".join(
        f"<tr><td><code>{_e(p['name'])}</code></td><td>{_e(p.get('in', ''))}</td>"
        f"<td class=t>{type_html(p.get('schema') or {})}</td>"
        f"<td>{'required' if p.get('required') else 'optional'}</td>"
        f"<td>{_e(p.get('description', ''))}</td></tr>"
        for p in params
    )
    return (
        "<table><tr><th>parameter</th><th>in</th><th>type</th><th></th><th>meaning</th></tr>"
        + rows
        + "</table>"
    )


def _content(content: Mapping[str, Any]) -> str:
    out = []
    for media, body in content.items():
        schema = body.get("schema") if isinstance(body, Mapping) else None
        drawn = type_html(schema) if isinstance(schema, Mapping) and schema else "(no schema)"
        inline = _members(schema) if isinstance(schema, Mapping) and "$ref" not in schema else ""
        out.append(f"<code>{_e(media)}</code>: {drawn}{inline}")
    return "<br>".join(out)


def _request_body(op: Mapping[str, Any]) -> str:
    body = op.get("requestBody")
    if not isinstance(body, Mapping):
        return ""
    need = "required" if body.get("required") else "optional"
    return f"<p><b>Request body</b> ({need}): {_content(body.get('content') or {})}</p>"


def _status_order(status: str) -> tuple[str, bool, str]:
    # 4XX after the 4xx codes it stands for, before the 5xx ones.
    return (status[:1], status.endswith("XX"), status)


def _responses(op: Mapping[str, Any]) -> str:
    answers: Mapping[str, Any] = op.get("responses") or {}
    rows, errors, error_bodies = [], [], []
    for status in sorted(map(str, answers), key=_status_order):
        answer = answers[status]
        meaning = _e(answer.get("description", ""))
        body = _content(answer.get("content") or {})
        if status[:1] in ("4", "5"):  # one row for the error answers, which share a body
            errors.append(f"<code>{_e(status)}</code> {meaning}")
            error_bodies.append(body)
        else:
            rows.append(f"<tr><td><code>{_e(status)}</code></td><td>{meaning}</td>")
            rows[-1] += f"<td class=t>{body}</td></tr>"
    if errors:
        bodies = "<br>".join(dict.fromkeys(error_bodies))
        rows.append(f"<tr><td>errors</td><td>{'<br>'.join(errors)}</td>")
        rows[-1] += f"<td class=t>{bodies}</td></tr>"
    if not rows:
        return ""
    return (
        "<table><tr><th>answer</th><th>meaning</th><th>body</th></tr>" + "".join(rows) + "</table>"
    )


def _operation(route: RouteFacts, method: str, op: Mapping[str, Any] | None) -> str:
    summary = (op or {}).get("summary") or route.summary
    roles = ", ".join(route.roles) or "(none)"
    parts = [
        f'<section class=op id="{_anchor("op", method + route.path)}">',
        f"<h3><span class='m {_e(method)}'>{_e(method)}</span> <code>{_e(route.path)}</code></h3>",
        f"<p>{_e(summary)}</p>",
        f"<p class=meta>Roles: <span class=roles>{_e(roles)}</span></p>",
    ]
    if op is None:
        parts.append("<p class=off>Not part of the OpenAPI document.</p>")
    else:
        if op.get("description"):
            parts.append(f"<p>{_e(op['description'])}</p>")
        parts += [_parameters(op), _request_body(op), _responses(op)]
    parts.append("</section>")
    return "".join(parts)


def _named_schemas(document: Mapping[str, Any]) -> dict[str, Any]:
    """The document's component schemas, and those an inline schema carries in its own
    ``$defs`` (a body documented by hand, whose references name them as components)."""
    found: dict[str, Any] = {}

    def walk(node: object) -> None:
        if isinstance(node, Mapping):
            for name, schema in (node.get("$defs") or {}).items():
                found.setdefault(str(name), schema)
            for value in node.values():
                walk(value)
        elif isinstance(node, list):
            for value in node:
                walk(value)

    walk(document.get("paths") or {})
    return {**found, **((document.get("components") or {}).get("schemas") or {})}


def _schemas(document: Mapping[str, Any]) -> str:
    found = _named_schemas(document)
    out = []
    for name in sorted(found):
        schema = found[name]
        description = f"<p>{_e(schema['description'])}</p>" if schema.get("description") else ""
        body = _members(schema) or f"<p class=t>{type_html(schema)}</p>"
        out.append(
            f'<section class=op id="{_anchor("schema", name)}"><h3>{_e(name)}</h3>'
            f"{description}{body}</section>"
        )
    return "".join(out)


def _ordered(methods: Iterable[str]) -> list[str]:
    known = [m for m in _METHOD_ORDER if m in methods]
    return known + sorted(set(methods) - set(known))


def render(document: Mapping[str, Any], routes: Iterable[RouteFacts], heading: str) -> str:
    """Return the page: ``routes`` grouped by tag in their order, with what ``document``
    (the OpenAPI document) says of each, and its schemas."""
    groups: dict[str, list[RouteFacts]] = {}
    for route in routes:
        groups.setdefault(route.tag, []).append(route)
    paths: Mapping[str, Any] = document.get("paths") or {}
    sections = []
    for tag, members in groups.items():
        ops = []
        for route in members:
            described = paths.get(route.path, {}) if route.in_document else {}
            for method in _ordered(route.methods):
                ops.append(_operation(route, method, described.get(method.lower())))
        sections.append(f'<h2 id="{_anchor("tag", tag)}">{_e(tag)}</h2>' + "".join(ops))
    nav = "".join(f'<li><a href="#{_anchor("tag", t)}">{_e(t)}</a></li>' for t in groups)
    info: Mapping[str, Any] = document.get("info") or {}
    count = sum(len(r.methods) for rs in groups.values() for r in rs)
    return (
        '<!doctype html><html lang="en"><head><meta charset="utf-8">'
        '<meta name="viewport" content="width=device-width, initial-scale=1">'
        f"<title>{_e(heading)}</title><style>{_STYLE}</style></head><body>"
        f"<header><h1>{_e(heading)}</h1><p>{_e(info.get('title', ''))}, version "
        f"{_e(info.get('version', ''))}: {count} operations. Every call needs a client "
        "certificate issued by the network's CA; the machine-readable document is "
        "<code>/openapi.json</code>.</p></header>"
        f'<nav><ul>{nav}<li><a href="#schemas">Schemas</a></li></ul></nav>'
        + "".join(sections)
        + '<h2 id="schemas">Schemas</h2>'
        + _schemas(document)
        + "</body></html>"
    )
