"""Config spellings renamed in fegrid 0.3 and removed in 0.4.

fegrid 0.3 accepted the old spellings with a deprecation message; since 0.4 a config that uses one
is refused with a one-paragraph error that names the new spelling (spec ids never depended on the
spelling, so rewriting the config changes no id and refits nothing).

================================= =================================== ============================
old spelling                      new spelling                        why
================================= =================================== ============================
``estimation.keep_singletons``    ``estimation.singletons: keep|drop`` a plain choice of what to do
                                                                      with observations alone in a
                                                                      fixed-effect group
``kind: iid``                     ``kind: homoskedastic``             says what it assumes
``kind: robust``                  ``kind: hc1``                       the trade's name of the
                                                                      estimator (MacKinnon & White
                                                                      1985)
``kind: cluster``                 ``kind: clustered``                 a plain description
``kind: twoway``                  ``kind: two_way_clustered``         a plain description (Cameron,
                                                                      Gelbach & Miller 2011)
================================= =================================== ============================

>>> try:
...     modernise({"clustering": {"c": {"kind": "cluster", "by": "u"}}})
... except Exception as exc:
...     print(str(exc)[:62])
clustering.c.kind: 'cluster' was renamed 'clustered' in fegrid
"""

from __future__ import annotations

import copy
from collections.abc import Mapping
from typing import Any

from .errors import ConfigError

__all__ = ["KIND_RENAMES", "modernise"]

#: Covariance kinds: old config value -> new config value.
KIND_RENAMES = {"iid": "homoskedastic", "robust": "hc1", "cluster": "clustered", "twoway": "two_way_clustered"}


def _refuse(text: str) -> None:
    raise ConfigError(f"{text} in fegrid 0.3, and the old spelling was removed in 0.4; write the new one "
                      "(spec ids do not change, nothing is refitted).")


def modernise(raw: Mapping[str, Any]) -> dict[str, Any]:
    """A copy of ``raw``, refused with the new spelling named when it uses a removed one."""
    out = copy.deepcopy(dict(raw))
    est = out.get("estimation")
    if isinstance(est, dict) and "keep_singletons" in est:
        keep = est["keep_singletons"]
        _refuse(f"estimation.keep_singletons was renamed estimation.singletons (write 'singletons: "
                f"{'keep' if keep else 'drop'}')")
    clustering = out.get("clustering")
    if isinstance(clustering, dict):
        for name, body in clustering.items():
            if isinstance(body, dict) and body.get("kind") in KIND_RENAMES:
                old = body["kind"]
                _refuse(f"clustering.{name}.kind: '{old}' was renamed '{KIND_RENAMES[old]}'")
    return out
