"""Building snapshots from raw timelines: readings per second on the demo fleet (>= 10^6)."""

from __future__ import annotations

import time

from common import ROOT, rate, report


def main() -> None:
    from causeline.service.features.logs import TimelineInputs
    from causeline.service.features.snapshots import build_snapshots, entity_features
    from causeline.training.config import load_config
    from fixtures.demo.timeline import generate_timeline

    config = load_config(ROOT / "fixtures" / "demo" / "timeline.yaml")
    started = time.perf_counter()
    timeline = generate_timeline(cases=480, days=365)
    report("timeline_generate_s", time.perf_counter() - started)
    inputs = TimelineInputs(timeline.readings, timeline.excursions, timeline.maintenance,
                            timeline.cases)
    readings = len(timeline.readings)
    report("timeline_readings", str(readings))
    spec = config.timeline
    assert spec is not None
    report("timeline_build_readings_per_s", rate(lambda: build_snapshots(spec, inputs), readings,
                                                 repeat=2))
    one = timeline.readings[timeline.readings["case_id"] == "DC-0001"].tail(6 * 8)
    history = timeline.maintenance[timeline.maintenance["case_id"] == "DC-0001"]
    single = TimelineInputs(one, None, history, timeline.cases)
    report("timeline_online_entities_per_s", rate(lambda: entity_features(config, single), 1))


if __name__ == "__main__":
    main()
