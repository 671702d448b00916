"""Run families: one run config as a template plus a CSV table, one run (member) per row.

A family entry of the workflow config::

    runs:
      stars:
        template: config/runs/star.yaml     # a run config file, or an inline mapping
        table: config/stars.csv             # one row per member
        key: name                           # the column naming each member
        fill:                               # template field (dotted path) <- column
          model.data: data_file
          parameters.0.init.normal.loc: t0_guess

Member ``NAME`` of family ``stars`` is the run ``stars.NAME`` (its results folder
``RESULTS/stars.NAME/``). A key holds letters, digits, ``_``, ``-`` and ``.`` and starts
with a letter or digit, so a member name is always one path-safe folder name, and the ``.``
(not allowed in plain run names) keeps members apart from plain runs.

Each member's seed is derived from the family seed (the template's ``seed``, or the
entry's own ``seed``) and the member's key through :class:`numpy.random.SeedSequence`
(entropy = family seed, spawn key = the SHA-256 of the key as eight 32-bit words), so it
depends on nothing else: adding, removing or reordering rows never changes another member's
draws. The derived seed is the member's ``seed`` setting, stored with its draws.

Table values fill the template as text; each setting's own validation converts them (a
number column into a number). Paths in the filled member (template paths and table values
alike) are relative to the template file's folder (to the working directory for an inline
template).
"""

from __future__ import annotations

import copy
import csv
import hashlib
import re
from pathlib import Path
from typing import Any

from pydantic import Field

from chainyard.config._base import _Strict
from chainyard.errors import ConfigError

__all__ = [
    "FamilySpec",
    "is_family",
    "member_name",
    "member_seed",
    "read_family",
]

#: what a member key may hold (one path-safe folder name once prefixed by the family)
KEY_PATTERN = re.compile(r"^[A-Za-z0-9][A-Za-z0-9_.-]*$")
#: largest table read (rows); a bound on what a table may make the planner allocate
MAX_ROWS = 1_000_000


class FamilySpec(_Strict):
    """A run family: a template run config and a table with one member per row."""

    template: str | dict[str, Any] = Field(
        description=(
            "The members' run config: the path of a run config file (paths inside relative "
            "to that file), or an inline mapping (paths relative to the working directory)."
        )
    )
    table: str = Field(min_length=1, description="CSV file (header row), one row per member.")
    key: str = Field(min_length=1, description="The column naming each member (unique).")
    fill: dict[str, str] = Field(
        default_factory=dict,
        description=(
            "Template field as a dotted path (list items by index, e.g. "
            "parameters.0.init.normal.loc) -> the column whose value it takes."
        ),
    )
    seed: int | None = Field(
        default=None,
        ge=0,
        description="Family seed (default: the template's seed); members' seeds derive from it.",
    )


def is_family(entry: Any) -> bool:
    """Whether a ``runs`` entry is a family (a mapping with a ``table``)."""
    return isinstance(entry, dict) and "table" in entry


def member_name(family: str, key: str) -> str:
    """The run name of a family member: ``FAMILY.KEY``."""
    return f"{family}.{key}"


def member_seed(family_seed: int, key: str) -> int:
    """The seed of a family member, from the family seed and the member's key alone.

    Parameters
    ----------
    family_seed : int
        The family's seed (>= 0).
    key : str
        The member's key (its row's value in the key column).

    Returns
    -------
    int
        A seed in ``[0, 2**63)``: the first 64-bit word of
        ``SeedSequence(family_seed, spawn_key=sha256(key) as 8 uint32)``, shifted right by 1.
    """
    import numpy as np

    digest = hashlib.sha256(key.encode("utf-8")).digest()
    words = tuple(int.from_bytes(digest[i : i + 4], "little") for i in range(0, 32, 4))
    seq = np.random.SeedSequence(family_seed, spawn_key=words)
    return int(seq.generate_state(1, np.uint64)[0]) >> 1


def _set_path(data: Any, path: str, value: str, where: str) -> None:
    """Set ``data[path]`` (dotted path; digits index lists); missing mappings are created."""
    parts = path.split(".")
    node = data
    for i, part in enumerate(parts):
        last = i == len(parts) - 1
        if isinstance(node, list):
            if not part.isdigit() or int(part) >= len(node):
                raise ConfigError(
                    f"{where}: fill: {path}: {'.'.join(parts[:i]) or 'the template'} is a list of "
                    f"{len(node)}; {part!r} is not an index of it"
                )
            idx = int(part)
            if last:
                node[idx] = value
            else:
                node = node[idx]
        elif isinstance(node, dict):
            if last:
                node[part] = value
            else:
                node = node.setdefault(part, {})
        else:
            raise ConfigError(
                f"{where}: fill: {path}: {'.'.join(parts[:i])} is a single value in the template, "
                "not a mapping or list"
            )


def _read_table(path: Path, key: str, columns: list[str]) -> list[tuple[int, dict[str, str]]]:
    """The table's rows as (line number, row); one-line errors naming the table and row."""
    name = str(path)
    try:
        with open(path, newline="", encoding="utf-8") as f:
            reader = csv.DictReader(f)
            header = reader.fieldnames
            if not header:
                raise ConfigError(f"{name}: the table is empty; it needs a header row")
            for col in [key, *columns]:
                if col not in header:
                    raise ConfigError(
                        f"{name}: no column {col!r} (columns: {', '.join(header)})"
                    )
            rows = []
            for row in reader:
                if len(rows) >= MAX_ROWS:
                    raise ConfigError(f"{name}: more than {MAX_ROWS:,} rows")
                if None in row:
                    raise ConfigError(
                        f"{name}: row {reader.line_num}: more values than the header's "
                        f"{len(header)} columns"
                    )
                rows.append((reader.line_num, row))
    except OSError as exc:
        raise ConfigError(f"{name}: cannot read the table: {exc.strerror or exc}") from None
    except (UnicodeDecodeError, csv.Error) as exc:
        raise ConfigError(f"{name}: not a readable CSV table: {exc}") from None
    return rows


def _template(spec: FamilySpec, where: str) -> tuple[dict[str, Any], str, str]:
    """The template mapping, its base folder and its name for messages."""
    from chainyard.config.yamlfile import read_yaml_file

    if isinstance(spec.template, dict):
        return copy.deepcopy(spec.template), ".", f"{where}.template"
    path = Path(spec.template)
    data = read_yaml_file(path, "run config file")
    if not isinstance(data, dict):
        raise ConfigError(f"{path}: must be a mapping of settings (a run config)")
    return data, str(path.parent), str(path)


def read_family(name: str, entry: dict[str, Any], source: str) -> list[tuple[str, Any, str]]:
    """Expand one family into its members, validating every row before any job starts.

    Parameters
    ----------
    name : str
        The family's name (its key under ``runs``).
    entry : dict
        The family entry (see :class:`FamilySpec`).
    source : str
        The workflow config's name, for messages.

    Returns
    -------
    list of (str, RunConfig, str)
        Member run name, validated config and base folder, in table order.

    Raises
    ------
    ConfigError
        One line per problem; a row's problem names the table, the row (line number and key)
        and the column.
    """
    from pydantic import ValidationError

    from chainyard.config import format_validation_error, parse_config

    where = f"{source}: runs.{name}"
    try:
        spec = FamilySpec.model_validate(entry)
    except ValidationError as exc:
        raise ConfigError(format_validation_error(exc, where, FamilySpec)) from None
    template, base_dir, tname = _template(spec, where)
    family_seed = spec.seed if spec.seed is not None else template.get("seed")
    if not isinstance(family_seed, int) or isinstance(family_seed, bool) or family_seed < 0:
        raise ConfigError(
            f"{tname}: seed: a family needs a seed (an integer >= 0) in its template or as "
            f"runs.{name}.seed; members' seeds derive from it"
        )
    table = Path(spec.table)
    rows = _read_table(table, spec.key, sorted(set(spec.fill.values())))
    members: list[tuple[str, Any, str]] = []
    problems: list[str] = []
    seen: dict[str, int] = {}
    base = Path(base_dir)
    for line, row in rows:
        key = (row.get(spec.key) or "").strip()
        at = f"{table}: row {line}"
        if not KEY_PATTERN.match(key):
            problems.append(
                f"{at}: column {spec.key} = {key!r}: a member key holds letters, digits, '_', "
                "'-' and '.', starting with a letter or digit"
            )
            continue
        if key in seen:
            problems.append(
                f"{at}: column {spec.key} = {key!r}: the same key as row {seen[key]}"
            )
            continue
        seen[key] = line
        at = f"{at} ({spec.key}={key})"
        data = copy.deepcopy(template)
        bad = False
        for path, col in spec.fill.items():
            value = (row.get(col) or "").strip()
            if not value:
                problems.append(f"{at}: column {col}: empty (it fills {path})")
                bad = True
                continue
            _set_path(data, path, value, where)
        if bad:
            continue
        data["seed"] = member_seed(family_seed, key)
        run = member_name(name, key)
        try:
            cfg = parse_config(data, base_dir=base, source="@")
        except ConfigError as exc:
            problems.extend(_row_problem(p, at, spec.fill, row, tname) for p in exc.problems)
            continue
        members.append((run, cfg, base_dir))
    if problems:
        raise ConfigError(problems)
    if not members:
        raise ConfigError(f"{table}: no rows; a family needs at least one member")
    return members


def _row_problem(
    problem: str, at: str, fill: dict[str, str], row: dict[str, str], template: str
) -> str:
    """A member's config problem, as a line naming the table, row and column when a filled
    field is at fault (else the template)."""
    text = problem[len("@: ") :] if problem.startswith("@: ") else problem
    for dotted, col in fill.items():
        path = re.sub(r"\.(\d+)(?=\.|$)", r"[\1]", dotted)  # as messages write list items
        if text == path or text.startswith((f"{path} ", f"{path}:", f"{path}.")):
            rest = text[len(path) :].lstrip(" =")
            value = (row.get(col) or "").strip()
            if rest.startswith(repr(value)):
                rest = rest[len(repr(value)) :].lstrip(" :")
            return f"{at}: column {col} = {value!r}: {rest}"
    return f"{at}: {template}: {text}"
