"""CheckLane: verify's second thread runs the tasks handed to it in order, one at a time, and
hands their first exception back to the caller's thread."""

from __future__ import annotations

import random
import threading
import time

import pytest

from goalkit.write.checklane import CheckLane


def test_tasks_run_in_the_order_handed_over():
    seen = []
    rng = random.Random(4)
    lane = CheckLane(depth=3)
    try:
        for i in range(200):
            pause = rng.choice((0.0, 0.0, 0.0005))
            lane.submit(lambda i=i, pause=pause: (time.sleep(pause), seen.append(i)))
        lane.drain()
    finally:
        lane.close()
    assert seen == list(range(200))


def test_only_one_task_runs_at_a_time():
    running, most = [0], [0]
    guard = threading.Lock()

    def task():
        with guard:
            running[0] += 1
            most[0] = max(most[0], running[0])
        time.sleep(0.001)
        with guard:
            running[0] -= 1

    lane = CheckLane(depth=4)
    try:
        for _ in range(30):
            lane.submit(task)
        lane.drain()
    finally:
        lane.close()
    assert most[0] == 1


def test_submit_waits_while_depth_tasks_wait():
    gate = threading.Event()
    lane = CheckLane(depth=2)
    handed = []

    def hand_over():
        for i in range(4):   # 1 running (held at the gate) + 2 waiting; the 4th must block
            lane.submit(gate.wait if i == 0 else (lambda: None))
            handed.append(i)

    t = threading.Thread(target=hand_over)
    t.start()
    time.sleep(0.2)
    assert handed == [0, 1, 2]
    gate.set()
    t.join(5)
    assert handed == [0, 1, 2, 3]
    lane.drain()
    lane.close()


def test_the_first_exception_comes_back_and_later_tasks_are_skipped():
    ran = []
    lane = CheckLane(depth=8)

    def fail():
        raise ValueError("task 2 failed")

    lane.submit(ran.append, 1)
    lane.submit(fail)
    lane.submit(ran.append, 3)
    with pytest.raises(ValueError, match="task 2 failed"):
        lane.drain()
    assert ran == [1]
    with pytest.raises(RuntimeError, match="closed"):   # a failed lane takes no more work
        lane.submit(ran.append, 4)
    lane.close()
    assert ran == [1]


def test_failed_before_gives_the_earlier_exception_once():
    lane = CheckLane()
    lane.submit(lambda: (_ for _ in ()).throw(KeyError("early")))
    error = lane.failed_before()
    assert isinstance(error, KeyError)
    assert lane.failed_before() is None
    lane.close()


def test_close_skips_waiting_tasks_and_stops_the_thread():
    gate = threading.Event()
    ran = []
    lane = CheckLane(depth=5)
    lane.submit(gate.wait)
    for i in range(4):
        lane.submit(ran.append, i)
    closer = threading.Thread(target=lane.close)
    closer.start()
    time.sleep(0.05)
    gate.set()
    closer.join(5)
    assert not closer.is_alive()
    assert ran == []
    assert not lane._thread.is_alive()
