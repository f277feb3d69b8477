"""Safe YAML reading with duplicate-key detection and line numbers.

Only safe construction is used. Every mapping comes back as a `LineMap` (a plain dict
that also knows the 1-based line of itself and of each key), so that loaders can name
the line of a bad value.
"""

from __future__ import annotations

from pathlib import Path
from typing import Any

import yaml

from diag.core.errors import DiagError


class LineMap(dict):
    """A dict that remembers where it and its keys stood in the file (1-based lines)."""

    line: int = 0
    key_lines: dict

    def line_of(self, key: Any) -> int:
        """Line of `key`, or of the mapping itself when the key is absent."""
        return self.key_lines.get(key, self.line)


# The C parser when libyaml is present (several times faster); same safe constructor.
_Base = getattr(yaml, "CSafeLoader", yaml.SafeLoader)


class _Loader(_Base):
    pass


def _construct_mapping(loader: _Loader, node: yaml.MappingNode, deep: bool = False) -> LineMap:
    loader.flatten_mapping(node)
    out = LineMap()
    out.line = node.start_mark.line + 1
    out.key_lines = {}
    for key_node, value_node in node.value:
        key = loader.construct_object(key_node, deep=True)
        try:
            hash(key)
        except TypeError:
            raise DiagError("a mapping key must be plain text or a number",
                            file=getattr(loader, "_diag_file", None),
                            line=key_node.start_mark.line + 1) from None
        if key in out:
            raise DiagError(
                f"duplicate key {key!r} (first on line {out.key_lines[key]})",
                file=getattr(loader, "_diag_file", None), line=key_node.start_mark.line + 1,
                hint="each key may appear once in a mapping; remove or rename one")
        out[key] = loader.construct_object(value_node, deep=True)
        out.key_lines[key] = key_node.start_mark.line + 1
    return out


_Loader.add_constructor(yaml.resolver.BaseResolver.DEFAULT_MAPPING_TAG, _construct_mapping)


def load_yaml_text(text: str, file: str | None = None) -> Any:
    """Parse YAML text safely; raise DiagError with file and line on any syntax problem."""
    loader = None
    try:
        loader = _Loader(text)
        loader._diag_file = file
        return loader.get_single_data()
    except DiagError:
        raise
    except yaml.MarkedYAMLError as exc:
        mark = exc.problem_mark or exc.context_mark
        line = mark.line + 1 if mark else None
        raise DiagError(f"YAML syntax: {exc.problem or exc.context}", file=file, line=line,
                        hint="check indentation, colons and quotes near this line") from None
    except yaml.YAMLError as exc:
        raise DiagError(f"YAML syntax: {exc}", file=file) from None
    finally:
        if loader is not None:
            loader.dispose()


def load_yaml_file(path: str | Path) -> Any:
    """Read and parse one YAML file (UTF-8)."""
    p = Path(path)
    try:
        text = p.read_text(encoding="utf-8")
    except FileNotFoundError:
        raise DiagError("file not found", file=str(path),
                        hint="check the path; bundled cases are listed by `diag`") from None
    except UnicodeDecodeError:
        raise DiagError("not UTF-8 text", file=str(path), hint="save the file as UTF-8") from None
    return load_yaml_text(text, file=str(path))
