"""`Due`: a result's time, with an event only for whoever waits for it.

Expected times are plain arithmetic on the delays the test sets (common
practice, no source)."""

import simpy

from sim.engine.due import Due


def _waiter(env, due, seen, start):
    yield env.timeout(start)
    if not due.processed:
        yield due.event()
    seen.append(env.now)


def test_a_waiter_before_and_one_after_the_result_both_see_it_at_its_time():
    env = simpy.Environment()
    due = Due(env)
    seen = []

    def producer():
        yield env.timeout(10)
        due.fire(5)           # out at 15

    env.process(producer())
    env.process(_waiter(env, due, seen, 3))     # waits from 3: resumed at 15
    env.process(_waiter(env, due, seen, 12))    # result known, not out yet: resumed at 15
    env.process(_waiter(env, due, seen, 20))    # already out: goes on at 20
    env.run()
    assert sorted(seen) == [15, 15, 20]
    assert due.at == 15 and due.processed


def test_no_event_is_scheduled_when_no_one_waits():
    env = simpy.Environment()
    due = Due(env)
    due.fire(7)
    assert not env._queue and due.at == 7 and not due.processed
    env.run(until=8)
    assert due.processed


def test_a_callback_registered_before_the_result_runs_at_its_time():
    env = simpy.Environment()
    due = Due(env)
    when = []
    due.event().callbacks.append(lambda _e: when.append(env.now))

    def producer():
        yield env.timeout(4)
        due.fire(0)

    env.process(producer())
    env.run()
    assert when == [4]
