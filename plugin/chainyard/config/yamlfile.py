"""Reading a YAML config file strictly: one line per problem, nothing silently dropped.

PyYAML's ``safe_load`` keeps the last of two equal keys in one mapping without a word; here
that is an error naming both lines. The file must be UTF-8 text (a UTF-8 byte-order mark is
allowed, as YAML allows it) holding one YAML document.
"""

from __future__ import annotations

from pathlib import Path
from typing import Any

import yaml

from chainyard.errors import ConfigError

__all__ = ["read_yaml_file"]

_MERGE_TAG = "tag:yaml.org,2002:merge"


class _DuplicateKey(Exception):
    def __init__(self, key: Any, first: int, again: int) -> None:
        super().__init__(key)
        self.key, self.first, self.again = key, first, again


class _UniqueKeyLoader(yaml.SafeLoader):
    """SafeLoader that refuses two equal keys in one mapping (merge keys ``<<`` excepted:
    a mapping may override what it merges in)."""

    def construct_mapping(self, node: yaml.Node, deep: bool = False) -> dict[Any, Any]:
        if isinstance(node, yaml.MappingNode):
            seen: dict[Any, int] = {}
            for key_node, _ in node.value:
                if key_node.tag == _MERGE_TAG:
                    continue
                key = self.construct_object(key_node, deep=True)
                try:
                    first = seen.get(key)
                except TypeError:  # unhashable key: the base class says so
                    continue
                line = key_node.start_mark.line + 1
                if first is not None:
                    raise _DuplicateKey(key, first, line)
                seen[key] = line
        return super().construct_mapping(node, deep=deep)  # type: ignore[no-any-return]


def _text(path: Path, raw: bytes, what: str) -> str:
    if raw.startswith((b"\xff\xfe", b"\xfe\xff")):
        raise ConfigError(f"{path}: is UTF-16 text; save the {what} as UTF-8")
    if b"\x00" in raw:
        raise ConfigError(f"{path}: is a binary file (it holds NUL bytes), not a YAML {what}")
    try:
        return raw.decode("utf-8-sig")
    except UnicodeDecodeError as exc:
        line = raw.count(b"\n", 0, exc.start) + 1
        raise ConfigError(
            f"{path}: is not UTF-8 text (byte 0x{raw[exc.start]:02x} at line {line}); save the "
            f"{what} as UTF-8"
        ) from None


def read_yaml_file(path: Path, what: str = "config file") -> Any:
    """Parse a YAML (or JSON) file strictly.

    Parameters
    ----------
    path : Path
        The file.
    what : str
        What the file is, for messages ("config file", "run config file").

    Returns
    -------
    object
        The document (None for an empty file; the caller says what it needs).

    Raises
    ------
    ConfigError
        One line naming the file: missing, a directory, unreadable, not UTF-8, binary, not
        valid YAML (with the line), several documents, or a key given twice.
    """
    path = Path(path)
    if path.is_dir():
        raise ConfigError(f"{path}: is a directory; expected a YAML {what}")
    try:
        raw = path.read_bytes()
    except FileNotFoundError:
        raise ConfigError(f"{path}: {what} not found") from None
    except OSError as exc:
        raise ConfigError(f"{path}: cannot read {what} ({exc.strerror or exc})") from None
    text = _text(path, raw, what)
    try:
        return yaml.load(text, Loader=_UniqueKeyLoader)
    except _DuplicateKey as dup:
        raise ConfigError(
            f"{path}: line {dup.again}: key {dup.key!r} appears twice in one mapping (first at "
            f"line {dup.first}); give each key once"
        ) from None
    except yaml.composer.ComposerError as exc:
        if "single document" in str(exc):
            raise ConfigError(
                f"{path}: holds more than one YAML document (a second '---'); expected one"
            ) from None
        raise ConfigError(f"{path}: not valid YAML{_line(exc)}") from None
    except yaml.constructor.ConstructorError as exc:
        problem = " ".join(str(exc.problem or "").split())
        raise ConfigError(f"{path}: not valid YAML{_line(exc)}: {problem}") from None
    except yaml.YAMLError as exc:
        raise ConfigError(f"{path}: not valid YAML{_line(exc)}") from None


def _line(exc: yaml.YAMLError) -> str:
    mark = getattr(exc, "problem_mark", None)
    return f" at line {mark.line + 1}" if mark is not None else ""
