"""One step shared by the assets of a fleet: elements ``(asset, x)``, each done by that asset's DoFn.

:class:`ByAssetFn` holds one DoFn per asset (each made with its asset's configuration, so the
configurations travel with the step, keyed by asset name) and sends every keyed element to its
asset's DoFn; what that DoFn yields comes out keyed by the same asset, tagged outputs included.
Counters made inside go to the asset's own namespace
(:func:`corrtransforms.beam.metrics.counting_for`), so each asset's window accounting is still
its own although the step is shared.
"""

from __future__ import annotations

from typing import Any, Dict, Iterable, Optional, Sequence, Tuple

import apache_beam as beam

from corrtransforms.beam.metrics import counting_for

_END = object()


def _keyed(asset: str, outputs: Optional[Iterable[Any]]):
    for out in outputs or ():
        if isinstance(out, beam.pvalue.TaggedOutput):
            yield beam.pvalue.TaggedOutput(out.tag, (asset, out.value))
        else:
            yield asset, out


class ByAssetFn(beam.DoFn):
    """``(asset, element)`` -> ``(asset, output)`` of ``dofns[asset].process(element)``.

    Parameters
    ----------
    dofns : dict
        Asset name -> its DoFn (whose ``finish_bundle`` yields nothing).
    sides : sequence of (str, default)
        The keywords under which the inner DoFns take their side inputs, with the value for an
        asset that has none. The step's side inputs, given to the ParDo in the same order, are
        dicts by asset (e.g. ``beam.pvalue.AsDict``): each asset gets its own value.
    series_keyed : bool
        The elements are ``((asset, ...), value)`` pairs (keyed by series) given whole to the
        inner DoFn, instead of ``(asset, element)`` pairs whose element alone is.
    """

    def __init__(self, dofns: Dict[str, beam.DoFn], sides: Sequence[Tuple[str, Any]] = (), series_keyed: bool = False):
        self._dofns, self._sides, self._series_keyed = dict(dofns), tuple(sides), series_keyed

    def setup(self):
        for asset, dofn in self._dofns.items():
            with counting_for(asset):
                dofn.setup()

    def start_bundle(self):
        for asset, dofn in self._dofns.items():
            with counting_for(asset):
                dofn.start_bundle()

    def process(self, keyed: Tuple[Any, Any], *sides):
        if self._series_keyed:
            asset, element = keyed[0][0], keyed
        else:
            asset, element = keyed
        kwargs = {name: side.get(asset, default) for (name, default), side in zip(self._sides, sides)}
        with counting_for(asset):
            outputs = iter(self._dofns[asset].process(element, **kwargs) or ())
        while True:  # the asset's namespace while its DoFn runs, not while later steps take the output
            with counting_for(asset):
                out = next(outputs, _END)
            if out is _END:
                return
            yield from _keyed(asset, [out])

    def finish_bundle(self):
        for asset, dofn in self._dofns.items():
            with counting_for(asset):
                left = list(dofn.finish_bundle() or ())
            if left:
                raise ValueError(f"{type(dofn).__name__} of {asset} emits in finish_bundle: not shareable by asset")

    def teardown(self):
        for asset, dofn in self._dofns.items():
            with counting_for(asset):
                dofn.teardown()
