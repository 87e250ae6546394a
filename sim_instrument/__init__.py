"""Simulated STEM instrument: a virtual perovskite specimen and a scan engine.

The pieces, from the specimen to the wire:

* :class:`Specimen` (``Specimen.from_scenario("demo")``) gives the true
  atomic columns and unit cells of any region, in nm.
* :class:`ScanEngine` scans it: ``engine.acquire(center_nm=..., fov_nm=...,
  shape_px=...)`` returns an :class:`Acquisition` (pixels, sidecar, truth).
* :func:`perovskite_frame` renders a small perfect lattice with exact truth
  for the tests of other parts.
* :class:`FolderSink`, :class:`ZmqSink` deliver frames; :mod:`sim_instrument.modes`
  runs survey, replay and serve loops; :class:`ScanRequest` is the
  ``scan-request`` schema.
"""

from sim_instrument.engine import (
    Acquisition,
    DriftModel,
    FrameTruth,
    ScanEngine,
    electrons_per_pixel,
)
from sim_instrument.outputs import FolderSink, ZmqSink, default_truth_dir
from sim_instrument.quick import perovskite_engine, perovskite_frame
from sim_instrument.requests import (
    SCAN_REQUEST_TOPIC,
    ScanRequest,
    ScanRequestError,
    decode_scan_request,
    encode_scan_request,
)
from sim_instrument.scenario import Scenario, ScenarioError, list_scenarios, load_scenario
from sim_instrument.specimen import Specimen, SpecimenCells, SpecimenColumns

__all__ = [
    "Acquisition",
    "DriftModel",
    "FrameTruth",
    "ScanEngine",
    "electrons_per_pixel",
    "FolderSink",
    "ZmqSink",
    "default_truth_dir",
    "perovskite_frame",
    "perovskite_engine",
    "SCAN_REQUEST_TOPIC",
    "ScanRequest",
    "ScanRequestError",
    "decode_scan_request",
    "encode_scan_request",
    "Scenario",
    "ScenarioError",
    "list_scenarios",
    "load_scenario",
    "Specimen",
    "SpecimenCells",
    "SpecimenColumns",
]
