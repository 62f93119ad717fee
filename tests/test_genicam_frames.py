"""Frame ids and time stamps from GenTL buffer info (drivers/genicam_frames.py): the camera's counter
where the producer gives one (the simulated producer free-runs, so its tests use the host count),
rebased across acquisition restarts so ids keep advancing while a dropped frame stays visible."""

import pytest

from maskrun.drivers.genicam_frames import FrameCounter


def test_camera_ids_keep_their_gaps_and_advance_across_restarts():
    c = FrameCounter()
    assert [c.frame_id(i)[0] for i in (7, 8, 10)] == [1, 2, 4]  # 9 was dropped: the gap stays for the daemon
    assert c.frame_id(11) == (5, "camera")
    c.restart()  # acquisition restarted (ROI change): the camera counts from 0 again
    assert [c.frame_id(i)[0] for i in (0, 1)] == [6, 7]
    assert c.frame_id(0)[0] == 8  # a counter that restarts on its own is rebased, never goes back


def test_without_a_camera_counter_or_when_free_running_the_host_counts():
    c = FrameCounter()
    assert c.frame_id(None) == (1, "host counter (the producer gives no frame id)")
    assert c.frame_id(40, count_kept=True)[0] == 2 and c.frame_id(43, count_kept=True)[0] == 3


def test_camera_time_stamps_are_put_on_the_host_clock_at_acquisition_start():
    c = FrameCounter()
    assert c.timestamp_s(5_000_000_000, 1000.0)[0] == pytest.approx(1000.0)
    stamp, source = c.timestamp_s(5_250_000_000, 1000.9)  # 0.25 s later on the camera's clock
    assert stamp == pytest.approx(1000.25) and source.startswith("camera clock")
    assert c.timestamp_s(None, 1234.5) == (1234.5, "host clock at delivery (the producer gives no time stamp)")
    c.restart()
    assert c.timestamp_s(10, 2000.0)[0] == pytest.approx(2000.0)
