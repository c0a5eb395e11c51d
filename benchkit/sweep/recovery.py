"""Recovery bookkeeping: what each instrument link recovered from (the drivers retry,
resynchronise and reconnect), recorded as events and as the `retried` flag of a point."""

from __future__ import annotations


class LinkRecoveries:
    """The engine's recovery job (mixed into benchkit.sweep.engine.SweepEngine)."""

    RETRY_COUNTERS = ("timeouts", "garbled", "link_errors", "reconnects")

    def _link_sessions(self) -> dict:
        """role -> its link session, each link once (the meter's internal bias shares the
        meter's link: counted once)."""
        out, seen = {}, set()
        for role, drv in self._raw.items():
            session = getattr(drv, "session", None)
            if session is not None and id(session) in seen:
                continue
            seen.add(id(session))
            if getattr(session, "counters", None) is not None:
                out[role] = session
        return out

    def _link_counts(self) -> dict:
        return {role: (dict(s.counters), list(getattr(s, "events", ())))
                for role, s in self._sessions.items()}

    def _watch_links(self) -> None:
        """The state _note_recoveries compares against: taken once the links are open (a
        reconnect reopens a session's resource, never replaces the session)."""
        self._sessions = self._link_sessions()
        self._links = self._link_counts()
        self._retries_seen = self._retry_total()

    def _retry_total(self) -> int:
        """The sum of every link's counters (they only grow): unchanged means nothing to
        note; a change is looked at counter by counter (looked at several times a point, so
        kept to one sum per link)."""
        return sum(s.counters.total() for s in self._sessions.values())

    def _note_recoveries(self) -> bool:
        """Log what each link recovered from since the last look (event link_recovered).

        After the supply's link was reopened its output must still be on: a supply that
        restarted comes back with its output off, and measuring on would log 0 V points.
        """
        total = self._retry_total()
        if total == self._retries_seen:
            return False  # no link retried since the last look
        self._retries_seen = total
        now = self._link_counts()
        seen = False
        for role, (counts, events) in now.items():
            before, old_events = self._links.get(role, ({}, []))
            delta = {k: counts.get(k, 0) - before.get(k, 0) for k in self.RETRY_COUNTERS
                     if counts.get(k, 0) > before.get(k, 0)}
            if not delta:
                continue
            seen = True
            new = events[len(old_events):] if len(events) > len(old_events) else events[-5:]
            self.log.event(self.t_s(), "link_recovered", role=role, at=self.where(), **delta,
                           detail=new[-10:])
            bias_link = getattr(self._raw["supply"], "session", None)
            is_bias = role == "supply" or (bias_link is not None and
                                           getattr(self._raw[role], "session", None) is bias_link)
            if is_bias and delta.get("reconnects") and self.output_on and not self.supply.output_on:
                from instruments.drivers.errors import InstrumentError

                res = getattr(self._raw["supply"], "resource", "?")
                what = "supply" if role == "supply" else f"{role}'s internal bias"
                noun = "supply" if role == "supply" else role
                raise InstrumentError(
                    f"{what} ({res}): after reconnecting, its output reads off although the sweep "
                    f"had it on (the {noun} may have restarted, or an interlock tripped); the "
                    f"sweep stops here: check the {noun}, its mains and interlock, then resume",
                    role=role, resource=res, command="OUTPut?")
        self._links = now
        return seen
