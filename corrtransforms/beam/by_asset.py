"""One step shared by the assets of a fleet: elements ``(asset, x)``, each done by that asset's DoFn.

:class:`ByAssetFn` holds one DoFn per asset (each made with its asset's configuration, so the
configurations travel with the step, keyed by asset name) and sends every keyed element to its
asset's DoFn; what that DoFn yields comes out keyed by the same asset, tagged outputs included.
Counters made inside go to the asset's own namespace
(:func:`corrtransforms.beam.metrics.counting_for`), so each asset's window accounting is still
its own although the step is shared.
"""

from __future__ import annotations

from typing import Any, Dict, Iterable, Optional, Tuple

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
    side_name : str, optional
        The keyword under which the inner DoFns take a side input. The step's one side input,
        ``side`` (a dict by asset, e.g. ``beam.pvalue.AsDict``), gives each asset its own value
        (None when the asset has none).
    """

    def __init__(self, dofns: Dict[str, beam.DoFn], side_name: Optional[str] = None):
        self._dofns, self._side_name = dict(dofns), side_name

    def setup(self):
        for asset, dofn in self._dofns.items():
            with counting_for(asset):
                dofn.setup()

    def start_bundle(self):
        for asset, dofn in self._dofns.items():
            with counting_for(asset):
                dofn.start_bundle()

    def process(self, keyed: Tuple[str, Any], side=None):
        asset, element = keyed
        kwargs = {} if self._side_name is None else {self._side_name: (side or {}).get(asset)}
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
