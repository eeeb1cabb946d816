"""``keep-rows``: a copy of a layer with only the features that meet a condition.

Chains and pipes need a step between two scripts that drops rows, e.g. the features that
point-remoteness flagged as outliers; this is that step, with the same ``--where`` language as
every script.
"""

from __future__ import annotations

from .. import layers


def keep_rows(data, *, layer, where, engine):
    """The features of ``data`` for which ``where`` holds, every field and the geometry kept."""
    frame, _ = layers.read_layer(data, layer=layer, where=where, engine=engine)
    return frame.copy()
