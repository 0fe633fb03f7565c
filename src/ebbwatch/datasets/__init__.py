"""Seeded generators of account fleets with planted truth, for the demo, tests and benchmarks.
Everything here is invented: :mod:`.fleet` makes fleets with planted changes and hard quiet
accounts; :mod:`.demo` writes the demo's scenario as files."""

from .demo import DemoScenario, demo_fleet, write_demo_scenario
from .fleet import CHANGE_KINDS, DEFAULT_EVENTS, EPOCH, QUIET_PROFILES, WEEKDAY_SHAPES, Fleet, day_number, make_fleet

__all__ = ["CHANGE_KINDS", "DEFAULT_EVENTS", "EPOCH", "QUIET_PROFILES", "WEEKDAY_SHAPES", "DemoScenario", "Fleet",
           "day_number", "demo_fleet", "make_fleet", "write_demo_scenario"]
