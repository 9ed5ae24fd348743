"""Check the workflow configuration against its JSON schema, one line per problem.

Snakemake's own ``validate`` stops at the first problem with a multi-line dump; this reports
every problem at once as ``config: KEY: problem`` before the workflow starts. The YAML schema
is read with ``yaml.safe_load``.
"""

from __future__ import annotations

import os


def config_problems(config: dict, schema_path: str | os.PathLike) -> list[str]:
    """One line per schema violation, naming the dotted key."""
    import jsonschema
    import yaml

    with open(schema_path, encoding="utf-8") as fh:
        schema = yaml.safe_load(fh)
    validator = jsonschema.Draft202012Validator(schema)
    lines = []
    for err in sorted(validator.iter_errors(config), key=lambda e: list(map(str, e.absolute_path))):
        key = ".".join(str(p) for p in err.absolute_path) or "(top level)"
        if err.validator == "additionalProperties":
            extra = sorted(set(err.instance) - set(err.schema.get("properties", {})))
            lines.append(f"config: {'.'.join([*map(str, err.absolute_path), extra[0]]) if extra else key}: unknown key"
                         + (f"s {', '.join(extra)}" if len(extra) > 1 else ""))
        else:
            lines.append(f"config: {key}: {err.message}")
    return lines
