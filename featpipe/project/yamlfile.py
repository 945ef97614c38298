"""Read YAML safely while remembering where every key and value sits, for `file:line:col` errors."""

from __future__ import annotations

from dataclasses import dataclass, field
from pathlib import Path

import yaml

from ..errors import Diagnostic, FeatpipeError

PathKey = tuple  # a path into the document: ("engine", "kind"), ("terms", 2)


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


def read_yaml(path: Path, display_name: str) -> YamlDocument:
    """Parse `path` with the safe loader; a syntax error becomes a positioned FeatpipeError."""
    text = path.read_text(encoding="utf-8")
    try:
        node = yaml.compose(text, Loader=yaml.SafeLoader)
    except yaml.YAMLError as error:
        mark = getattr(error, "problem_mark", None) or getattr(error, "context_mark", None)
        line, col = (mark.line + 1, mark.column + 1) if mark else (1, 1)
        problem = getattr(error, "problem", None) or str(error)
        raise FeatpipeError(diagnostics=[Diagnostic(display_name, line, col, f"YAML syntax error: {problem}")])
    document = YamlDocument(display_name, None)
    if node is None:
        document.data = {}
        return document
    document.data = _convert(node, (), document)
    return document


def _convert(node: yaml.Node, path: PathKey, document: YamlDocument):
    document.value_positions[path] = (node.start_mark.line + 1, node.start_mark.column + 1)
    if isinstance(node, yaml.MappingNode):
        result = {}
        for key_node, value_node in node.value:
            key = _scalar(key_node)
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
        return loader.construct_object(node, deep=True)
    finally:
        loader.dispose()
