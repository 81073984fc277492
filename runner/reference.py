"""The protocol field reference for the README, generated from the schema.

``python -m runner.reference`` prints the Markdown tables; a test checks that
README.md contains exactly this text, so the reference cannot drift from the
code.  Meanings come from the ``Attributes`` sections of the model docstrings.
"""

from __future__ import annotations

import inspect
import re
import typing

from pydantic import BaseModel

from runner.protocol import Protocol


def attribute_docs(cls) -> dict[str, str]:
    """Field descriptions from a numpydoc ``Attributes`` section."""
    doc = inspect.getdoc(cls) or ""
    parts = re.split(r"\nAttributes\n-+\n", doc)
    out: dict[str, str] = {}
    if len(parts) < 2:
        return out
    current: list[str] = []
    for line in parts[1].splitlines():
        if line and not line.startswith(" "):
            current = [n.strip() for n in line.split(" : ")[0].split(",")]
            out.update({n: "" for n in current})
        elif current:
            for n in current:
                out[n] = (out[n] + " " + line.strip()).strip()
    return {k: v.replace("``", "`").replace("|", "/") for k, v in out.items()}


def _default_text(value) -> str:
    if isinstance(value, bool):
        return str(value).lower()
    if isinstance(value, str):
        return f'"{value}"'
    return repr(value)


def _section_model(annotation):
    for candidate in (annotation, *typing.get_args(annotation)):
        if isinstance(candidate, type) and issubclass(candidate, BaseModel):
            return candidate
    return None


def _table(cls, prefix: str) -> list[str]:
    docs = attribute_docs(cls)
    lines = ["| field | default | meaning |", "|---|---|---|"]
    for name, info in cls.model_fields.items():
        if _section_model(info.annotation) is not None:
            continue
        default = "(required)" if info.is_required() else f"`{_default_text(info.get_default(call_default_factory=True))}`"
        lines.append(f"| `{prefix}{name}` | {default} | {docs.get(name, '')} |")
    return lines


def reference_markdown() -> str:
    """All protocol fields as Markdown tables, one per section."""
    lines = ["Top level:", "", *_table(Protocol, "")]
    for name, info in Protocol.model_fields.items():
        section = _section_model(info.annotation)
        if section is None:
            continue
        summary = (inspect.getdoc(section) or "").splitlines()[0]
        lines += ["", f"`[{name}]` — {summary}", "", *_table(section, "")]
    return "\n".join(lines) + "\n"


if __name__ == "__main__":  # pragma: no cover
    print(reference_markdown(), end="")
