"""Every default setting, read from the config's JSON Schema: the schema states each default once.

:func:`fill_defaults` completes a config with the schema's defaults (what ``load_config`` does
first, and what Snakemake's ``validate(..., set_default=True)`` does too, so both see the same
settings). :data:`DEFAULTS` holds the defaults of the engine's settings by dotted config key, for
the Python API's keyword defaults (``BlockSettings``, ``fit_one``, ``WildBootstrap``...).
"""

from __future__ import annotations

import copy
from collections.abc import Iterator, Mapping
from functools import lru_cache
from typing import Any

import jsonschema
import yaml

from .locations import SCHEMA_PATH

__all__ = ["SCHEMA_PATH", "schema", "fill_defaults", "DEFAULTS"]



@lru_cache(maxsize=1)
def schema() -> dict[str, Any]:
    """The config's JSON Schema, parsed by libyaml where PyYAML has it (every process parses it at import:
    37 ms in pure Python, 5 ms in C, the same dictionary)."""
    return yaml.load(SCHEMA_PATH.read_text(), Loader=getattr(yaml, "CSafeLoader", yaml.SafeLoader))  # noqa: S506


def _with_defaults(validator_class: type) -> type:
    """A validator that sets each missing property to its schema default while it validates."""
    check_properties = validator_class.VALIDATORS["properties"]

    def set_defaults(validator: Any, properties: dict, instance: Any, subschema: dict) -> Iterator[Any]:
        if isinstance(instance, dict):
            for name, prop in properties.items():
                if "default" in prop and name not in instance:
                    instance[name] = copy.deepcopy(prop["default"])
        yield from check_properties(validator, properties, instance, subschema)

    return jsonschema.validators.extend(validator_class, {"properties": set_defaults})


_FILLER = _with_defaults(jsonschema.Draft202012Validator)


def fill_defaults(raw: Mapping[str, Any]) -> dict[str, Any]:
    """A copy of ``raw`` with every schema default filled in (errors are left to the checks)."""
    filled = copy.deepcopy(dict(raw))
    for _ in _FILLER(schema()).iter_errors(filled):
        pass
    return filled


def _engine_defaults() -> dict[str, Any]:
    probe = fill_defaults({"clustering": {"c": {"kind": "clustered", "by": "u", "wild_bootstrap": {}}},
                           "tables": {"t": {}}})
    out: dict[str, Any] = {"confidence_level": probe["confidence_level"]}
    out.update({f"tables.{k}": v for k, v in probe["tables"]["t"].items()})
    for section in ("estimation", "inference_warnings", "joint_inference", "jobs", "significance"):
        out.update({f"{section}.{k}": v for k, v in probe[section].items()})
    out.update({f"wild_bootstrap.{k}": v for k, v in probe["clustering"]["c"]["wild_bootstrap"].items()})
    return out


#: Defaults of the engine's settings by dotted config key, e.g. ``DEFAULTS["estimation.tolerance"]``.
DEFAULTS: Mapping[str, Any] = _engine_defaults()
