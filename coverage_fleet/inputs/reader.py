"""The one reader of input files: bytes from disk, then YAML, every fault a Problem.

File faults (one wording each; a file named by a key of another file gets its path added):

    file not found | is a directory, not a file | is not a regular file |
    cannot be read (permission denied) | is too large (... MB; at most 256 MB) |
    is not UTF-8 text (undecodable byte 0x89 at offset 0); is it a binary file? |
    not valid YAML (line 2, column 5): ... | duplicate key (lines 3 and 7): write each key once

YAML rules beyond PyYAML's defaults:
- Duplicate keys are refused. YAML requires the keys of a mapping to be unique (YAML 1.2.2,
  section 3.2.1.1); PyYAML keeps the last value silently, which hides typos.
- Exponent numbers without a dot (`1e9`, `2E-3`) are floats, as in the YAML 1.2 core
  schema (YAML 1.2.2, section 10.3.2) and the ROS 2 parameter-file parser (it reads any
  strtod-parsable value as a double); PyYAML (YAML 1.1) would read them as strings.
"""

from __future__ import annotations

import os
import re
import stat
from pathlib import Path
from typing import Any

import yaml

from coverage_fleet.errors import ConfigError, Problem
from coverage_fleet.inputs.fields import duplicate_key_message, key_path, type_message

#: Larger input files are refused before they are read (a raster of 4000 x 4000 doubles is
#: 128 MB; a mission or vehicle file is a few kB).
MAX_FILE_BYTES = 256 * 1024 * 1024

_EXPONENT_FLOAT = re.compile(r"^[-+]?(?:[0-9]+(?:\.[0-9]*)?|\.[0-9]+)[eE][-+]?[0-9]+$")


def file_fault(path: Path) -> str | None:
    """Why `path` cannot be read as an input file, or None (checked without reading it)."""
    try:
        info = os.stat(path)
    except FileNotFoundError:
        return "file not found"
    except NotADirectoryError:
        return "file not found (a parent is not a folder)"
    except PermissionError:
        return "cannot be read (permission denied)"
    except OSError as error:
        return f"cannot be read ({error.strerror or error})"
    if stat.S_ISDIR(info.st_mode):
        return "is a directory, not a file"
    if not stat.S_ISREG(info.st_mode):
        return "is not a regular file"
    if info.st_size > MAX_FILE_BYTES:
        return (f"is too large ({info.st_size / 1e6:.0f} MB; at most "
                f"{MAX_FILE_BYTES / 2**20:.0f} MB)")
    return None


def read_bytes(path: str | Path, *, source: str | None = None, key: str = "") -> bytes:
    """The file's bytes. Faults are raised as ConfigError: against the file itself, or with
    `source`/`key`, against the key of the file that names it (the path is then added)."""
    path = Path(path)
    fault = file_fault(path)
    if fault is None:
        try:
            return path.read_bytes()
        except PermissionError:
            fault = "cannot be read (permission denied)"
        except OSError as error:
            fault = f"cannot be read ({error.strerror or error})"
    if source is None:
        raise ConfigError.single(str(path), "", fault)
    raise ConfigError.single(source, key, f"{fault} ({path})")


def decode_text(data: bytes, source: str, key: str = "") -> str:
    """UTF-8 text (a leading byte-order mark is dropped); anything else is a problem."""
    try:
        return data.decode("utf-8-sig")
    except UnicodeDecodeError as error:
        byte = data[error.start]
        raise ConfigError.single(
            source, key, f"is not UTF-8 text (undecodable byte 0x{byte:02x} at offset "
            f"{error.start}); is it a binary file?"
        ) from None


class _Loader(yaml.SafeLoader):
    """SafeLoader plus YAML 1.2 exponent floats."""


_Loader.add_implicit_resolver(
    "tag:yaml.org,2002:float", _EXPONENT_FLOAT, list("-+0123456789.")
)


def parse_yaml(text: str, source: str, *, strip_levels: int = 0) -> Any:
    """Parse one YAML document; duplicate keys and syntax errors are problems. Duplicate keys
    are reported by key path without its first `strip_levels` parts (a vehicle file's
    node name and `ros__parameters`, so keys read as everywhere else)."""
    loader = _Loader(text)
    try:
        node = loader.get_single_node()
        if node is None:
            return None
        duplicates = _duplicate_keys(node)
        if duplicates:
            raise ConfigError([
                Problem(source, key_path(parts[strip_levels:] if len(parts) > strip_levels
                                         else parts), message)
                for parts, message in duplicates
            ])
        return loader.construct_document(node)
    except yaml.YAMLError as error:
        mark = getattr(error, "problem_mark", None)
        where = f" (line {mark.line + 1}, column {mark.column + 1})" if mark else ""
        reason = getattr(error, "problem", None) or str(error)
        raise ConfigError.single(source, "", f"not valid YAML{where}: {reason}") from None
    except RecursionError:
        raise ConfigError.single(source, "", "not valid YAML: nested too deeply") from None
    finally:
        loader.dispose()


def _duplicate_keys(root: yaml.Node) -> list[tuple[list[str | int], str]]:
    found: list[tuple[list[str | int], str]] = []
    seen_nodes: set[int] = set()
    stack: list[tuple[yaml.Node, list[str | int]]] = [(root, [])]
    while stack:
        node, parts = stack.pop()
        if id(node) in seen_nodes:  # aliases: each node once
            continue
        seen_nodes.add(id(node))
        if isinstance(node, yaml.MappingNode):
            first_line: dict[tuple[str, str], int] = {}
            for key_node, value_node in node.value:
                if key_node.tag == "tag:yaml.org,2002:merge":
                    stack.append((value_node, parts))
                    continue
                name = key_node.value if isinstance(key_node, yaml.ScalarNode) else "?"
                ident = (key_node.tag, str(name))
                line = key_node.start_mark.line + 1
                if ident in first_line:
                    found.append(([*parts, name], duplicate_key_message(first_line[ident], line)))
                else:
                    first_line[ident] = line
                stack.append((value_node, [*parts, name]))
        elif isinstance(node, yaml.SequenceNode):
            for index, item in enumerate(node.value):
                stack.append((item, [*parts, index]))
    found.sort(key=lambda item: item[1])
    return found


def read_yaml_file(path: str | Path, *, strip_levels: int = 0) -> tuple[Any, bytes]:
    """Parsed document and the file's bytes (for content hashes); ConfigError on any fault."""
    source = str(path)
    data = read_bytes(path)
    return parse_yaml(decode_text(data, source), source, strip_levels=strip_levels), data


def require_mapping(document: Any, source: str, what: str) -> dict[str, Any]:
    """The document as a mapping of keys, else a problem naming what the file should be."""
    if document is None:
        raise ConfigError.single(source, "", f"is empty; {what}")
    if not isinstance(document, dict):
        raise ConfigError.single(source, "", type_message(f"a mapping of keys ({what})",
                                                          document))
    return document
