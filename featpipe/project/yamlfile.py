"""Read project files safely: UTF-8 text of a bounded size, and YAML that remembers where every key
and value sits, for `file:line:col` errors.

Project files come from pull requests like code, so a file featpipe cannot read as intended (not
UTF-8, too large, nested too deeply, a YAML tag or a list where a key belongs) is refused with one
positioned line, never a traceback.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from pathlib import Path

import yaml

from ..errors import Diagnostic, FeatpipeError

PathKey = tuple  # a path into the document: ("engine", "kind"), ("terms", 2)

MAX_FILE_BYTES = 1_000_000  # the largest project file (featpipe.yaml, a spec, a term file) featpipe reads


@dataclass
class YamlDocument:
    """A parsed YAML file: plain data plus the 1-based position of each key and value."""

    file: str
    data: object
    key_positions: dict[PathKey, tuple[int, int]] = field(default_factory=dict)
    value_positions: dict[PathKey, tuple[int, int]] = field(default_factory=dict)

    def at(self, path: PathKey, message: str, *, key: bool = False, severity: str = "error") -> Diagnostic:
        """A diagnostic at the value (or key) of `path`, falling back to its nearest parent."""
        table = self.key_positions if key else self.value_positions
        probe = tuple(path)
        while probe and probe not in table and probe not in self.value_positions:
            probe = probe[:-1]
        line, col = table.get(probe) or self.value_positions.get(probe, (1, 1))
        return Diagnostic(self.file, line, col, message, severity)


def read_text(path: Path, display_name: str) -> str:
    """The UTF-8 text of a project file; a file too large or not UTF-8 is a positioned FeatpipeError."""
    size = path.stat().st_size
    if size > MAX_FILE_BYTES:
        raise FeatpipeError(diagnostics=[Diagnostic(display_name, 1, 1, f"the file holds {size:,} bytes; project files "
                                                    f"may hold at most {MAX_FILE_BYTES:,}: split it into smaller files")])
    data = path.read_bytes()
    try:
        return data.decode("utf-8")
    except UnicodeDecodeError as error:
        line = data.count(b"\n", 0, error.start) + 1
        col = len(data[data.rfind(b"\n", 0, error.start) + 1:error.start].decode("utf-8", errors="replace")) + 1
        message = f"not UTF-8 text (byte 0x{data[error.start]:02X}); save the file as UTF-8"
        raise FeatpipeError(diagnostics=[Diagnostic(display_name, line, col, message)]) from None


def read_yaml(path: Path, display_name: str) -> YamlDocument:
    """Parse `path` with the safe loader; a syntax error becomes a positioned FeatpipeError."""
    text = read_text(path, display_name)
    document = YamlDocument(display_name, {})
    try:
        _refuse_aliases(text, display_name)
        node = yaml.compose(text, Loader=yaml.SafeLoader)
        if node is not None:
            document.data = _convert(node, (), document)
    except yaml.YAMLError as error:
        raise _positioned(error, display_name) from None
    except RecursionError:  # PyYAML composes nested collections recursively and offers no depth limit
        raise FeatpipeError(diagnostics=[Diagnostic(display_name, 1, 1, "YAML nested too deeply to read; "
                                                    "project files need a few levels of keys only")]) from None
    return document


def _refuse_aliases(text: str, file: str) -> None:
    """Anchors and aliases (`&a`, `*a`) let a few hundred bytes expand into millions of values; a project
    file needs neither, so the first one is refused before anything is built."""
    for event in yaml.parse(text, Loader=yaml.SafeLoader):
        if isinstance(event, yaml.AliasEvent) or getattr(event, "anchor", None):
            mark = event.start_mark
            raise FeatpipeError(diagnostics=[Diagnostic(file, mark.line + 1, mark.column + 1,
                "YAML anchors and aliases (&name, *name) are not allowed in project files; write the value out")])


def _positioned(error: yaml.YAMLError, file: str) -> FeatpipeError:
    mark = getattr(error, "problem_mark", None) or getattr(error, "context_mark", None)
    line, col = (mark.line + 1, mark.column + 1) if mark else (1, 1)
    problem = getattr(error, "problem", None) or str(error)
    return FeatpipeError(diagnostics=[Diagnostic(file, line, col, f"YAML syntax error: {problem}")])


def _convert(node: yaml.Node, path: PathKey, document: YamlDocument):
    document.value_positions[path] = (node.start_mark.line + 1, node.start_mark.column + 1)
    if isinstance(node, yaml.MappingNode):
        result = {}
        for key_node, value_node in node.value:
            if not isinstance(key_node, yaml.ScalarNode):
                line, col = key_node.start_mark.line + 1, key_node.start_mark.column + 1
                raise FeatpipeError(diagnostics=[Diagnostic(document.file, line, col,
                                                            "a key must be a name, not a list or a mapping")])
            key = key_node.value  # as written: a column named yes, no, on or off stays a text
            if key in result:
                line, col = key_node.start_mark.line + 1, key_node.start_mark.column + 1
                raise FeatpipeError(diagnostics=[Diagnostic(document.file, line, col, f"duplicate key '{key}'")])
            document.key_positions[path + (key,)] = (key_node.start_mark.line + 1, key_node.start_mark.column + 1)
            result[key] = _convert(value_node, path + (key,), document)
        return result
    if isinstance(node, yaml.SequenceNode):
        return [_convert(item, path + (index,), document) for index, item in enumerate(node.value)]
    return _scalar(node)


def _scalar(node: yaml.Node):
    loader = yaml.SafeLoader("")
    try:
        return loader.construct_object(node, deep=True)  # a tag it does not construct raises a YAMLError
    finally:
        loader.dispose()
