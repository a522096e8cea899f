"""When an operation's result is out, as a time first and an event only on demand.

An operation's result (a score block's probabilities, a p.V output, a top-k
selection) is waited for by whoever depends on it: a fetch held for a softmax
decision, the next layer's operations, the step's writes. Most of them look
only after it is out, so a simpy event scheduled for every result would mostly
be processed with no one waiting. A :class:`Due` keeps the time the result is
out and makes an event only for a process that has to wait for it, or a
callback to run then.
"""


def later(env, delay, event, value=None):
    """Fire ``event`` with ``value`` ``delay`` cycles from now (pipeline latency).

    Schedules the event itself, as ``simpy.Timeout`` does, instead of a
    second timeout event that would then trigger it.
    """
    if delay <= 0:
        event.succeed(value)
    else:
        event._ok = True
        event._value = value
        env.schedule(event, delay=delay)


class Due:
    """The time an operation's result is out: unknown until the unit producing it is done."""

    __slots__ = ("env", "at", "_event")

    def __init__(self, env):
        self.env = env
        self.at = None          # when the result is out, once known
        self._event = None

    @property
    def processed(self):
        """Whether the result is out by now (the name simpy gives a fired event's state)."""
        return self.at is not None and self.at <= self.env.now

    def fire(self, delay):
        """The result will be out ``delay`` cycles from now."""
        self.at = self.env.now + delay
        if self._event is not None:
            later(self.env, delay, self._event)

    def event(self):
        """A simpy event that fires when the result is out, to wait on or call back from."""
        ev = self._event
        if ev is None:
            ev = self._event = self.env.event()
            if self.at is not None:
                later(self.env, self.at - self.env.now, ev)
        return ev
