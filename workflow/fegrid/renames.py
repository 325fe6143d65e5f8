"""Config spellings renamed in fegrid 0.3, accepted for one release with a deprecation message.

Each old spelling still works in 0.3.x: the config is rewritten to the new spelling before it is
checked (so spec ids do not change), and a :class:`FegridDeprecationWarning` names the new key or
value. Release 0.4 removes them.

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

>>> import warnings
>>> with warnings.catch_warnings(record=True) as caught:
...     warnings.simplefilter("always")
...     new = modernise({"clustering": {"c": {"kind": "cluster", "by": "u"}}})
>>> new["clustering"]["c"]["kind"], str(caught[0].message)[:51]
('clustered', "clustering.c.kind: 'cluster' is renamed 'clustered'")
"""

from __future__ import annotations

import copy
import warnings
from collections.abc import Mapping
from typing import Any

from .errors import FegridDeprecationWarning

__all__ = ["KIND_RENAMES", "modernise"]

#: Covariance kinds: old config value -> new config value.
KIND_RENAMES = {"iid": "homoskedastic", "robust": "hc1", "cluster": "clustered", "twoway": "two_way_clustered"}


def _say(text: str) -> None:
    warnings.warn(f"{text}; the old spelling is accepted in fegrid 0.3 only.", FegridDeprecationWarning,
                  stacklevel=3)


def modernise(raw: Mapping[str, Any]) -> dict[str, Any]:
    """A copy of ``raw`` with every renamed key or value in its new spelling (a warning for each)."""
    out = copy.deepcopy(dict(raw))
    est = out.get("estimation")
    if isinstance(est, dict) and "keep_singletons" in est:
        keep = est.pop("keep_singletons")
        if "singletons" not in est:
            est["singletons"] = "keep" if keep else "drop"
        _say(f"estimation.keep_singletons is renamed estimation.singletons (write 'singletons: "
             f"{'keep' if keep else 'drop'}')")
    clustering = out.get("clustering")
    if isinstance(clustering, dict):
        for name, body in clustering.items():
            if isinstance(body, dict) and body.get("kind") in KIND_RENAMES:
                old = body["kind"]
                body["kind"] = KIND_RENAMES[old]
                _say(f"clustering.{name}.kind: '{old}' is renamed '{KIND_RENAMES[old]}'")
    return out
