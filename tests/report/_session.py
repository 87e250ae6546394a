"""A small real session for the report tests: the daemon on simulated demo frames.

The decision loop (which fills flags, proposals, decisions and drift) is not
part of this session's daemon, so those rows are added afterwards through the
ledger's own API, the way the decision loop writes them.
"""

from __future__ import annotations

import time
from pathlib import Path


from livequant.config import Settings
from livequant.daemon import Daemon, Ledger
from livequant.frames import write_frame

from tests.daemon._helpers import running_daemon, wait_for

#: Frame centres on the demo specimen (stage nm): a 180-degree wall at x = -40,
#: a plain domain, and the neighbourhood of the vortex pair at (-100, 60) / (-90, 60).
CENTRES_NM = ((-40.0, 0.0), (-10.0, 0.0), (-95.0, 60.0))
FOV_NM = 5.12
SHAPE = (256, 256)  # 20 pm pixels: about 13 x 13 cells


def session_settings() -> Settings:
    daemon = dict(ingest_port=0, events_port=0, commands_port=0, settle_time_s=0.6,
                  rescan_interval_s=0.2, heartbeat_s=1.0, grace_s=60.0, tick_s=0.05)
    return Settings.model_validate({"workers": 1, "daemon": daemon,
                                    "analysis": {"material": "PbTiO3"}})


def simulated_frames(watch: Path) -> list[str]:
    """Write the demo frames (image then sidecar) and one unreadable frame; return ids."""
    from sim_instrument import DriftModel, ScanEngine, Specimen

    engine = ScanEngine(Specimen.from_scenario("demo"), drift=DriftModel.none(), seed=5,
                        frame_prefix="demo")
    ids = []
    for k, centre in enumerate(CENTRES_NM):
        # high dose (50 pA, 20 us) so the wall and the displacement directions stand out
        acq = engine.acquire(centre, FOV_NM, SHAPE, dwell_time_us=20.0, beam_current_pa=50.0,
                             scan_rotation_deg=0.0 if k != 1 else 10.0)
        write_frame(watch, acq.frame_id, acq.pixels, acq.sidecar)
        ids.append(acq.frame_id)
    # a frame the reader rejects: quarantined with a reason
    (watch / "broken.npy").write_bytes(b"this is not a numpy file")
    (watch / "broken.json").write_text('{"frame_id": "broken", "pixel_size_pm": 20.0}')
    return ids


def decision_loop_rows(session: Path, frame_ids: list[str]) -> None:
    """Flags, proposals, decisions and drift as the decision loop records them."""
    wall_frame, plain_frame, vortex_frame = frame_ids
    with Ledger(session / "ledger.sqlite") as led:
        f1 = led.add_flag(frame_id=wall_frame, rule="walls", kind="domain-wall", score=0.9,
                          region={"x_px": 128.0, "y_px": 128.0, "width_px": 60.0,
                                  "height_px": 200.0, "angle_deg": 0.0},
                          payload={"message": "180° wall <fit> & width 0.5 nm",
                                   "evidence": {"width_pm": 530.0},
                                   "region_stage": {"center_x_nm": -40.0, "center_y_nm": 0.0,
                                                    "width_nm": 1.2, "height_nm": 4.0,
                                                    "rotation_deg": 0.0}})
        f2 = led.add_flag(frame_id=vortex_frame, rule="topology", kind="vortex", score=0.6,
                          region={"x_px": 60.0, "y_px": 100.0, "width_px": 40.0,
                                  "height_px": 40.0, "angle_deg": 30.0},
                          payload=None)  # no payload at all: the report must cope
        led.add_flag(frame_id=vortex_frame, rule="plugin<script>", kind="anomaly", score=0.2,
                     region=None, payload={"message": "<b>not markup</b>"})
        led.add_proposal("p-1", region={"center_x_nm": -40.0, "center_y_nm": 0.0,
                                        "width_nm": 2.0, "height_nm": 2.0, "rotation_deg": 0.0},
                         frame_id=wall_frame, score=0.9,
                         payload={"pixel_size_pm": 8.0, "dwell_time_us": 4.0,
                                  "reason": "wall: finer look", "flag_ids": [f1]})
        led.add_proposal("p-2", region={"center_x_nm": -96.0, "center_y_nm": 61.0,
                                        "width_nm": 3.0, "height_nm": 3.0, "rotation_deg": 15.0},
                         frame_id=vortex_frame, score=0.6, payload={"flag_ids": [f2]})
        led.add_proposal("p-3", region={"center_x_nm": "nan?"}, frame_id=plain_frame)
        time.sleep(0.02)
        led.decide("p-1", "accept", decided_by="operator", note="go")
        time.sleep(0.02)
        led.decide("p-2", "reject", decided_by="operator")
        now = time.time()
        for k, fid in enumerate(frame_ids):
            led.add_drift(frame_id=fid, t=now - 30 + 10 * k, dx_nm=0.1 * k, dy_nm=-0.05 * k,
                          sigma_nm=0.02 if k else None, ref_frame_id=frame_ids[0] if k else None)


def make_session(root: Path) -> tuple[Path, list[str]]:
    """Run the daemon on the simulated frames, then add the decision-loop rows."""
    watch, session = root / "watch", root / "session"
    watch.mkdir(parents=True)
    daemon = Daemon(session_settings(), session=session, watch=watch)
    with running_daemon(daemon):
        ids = simulated_frames(watch)
        wait_for(lambda: daemon.snapshot.counts.get("done", 0) == len(ids) and
                 daemon.snapshot.counts.get("quarantined", 0) == 1, timeout_s=60,
                 what="the simulated frames analysed")
    decision_loop_rows(session, ids)
    return session, ids
