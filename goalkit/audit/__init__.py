"""An audit of a built set that shares no code with the builder.

``goalkit verify`` replays the relabelling and reward code that built a set, so a slip in that
code would pass the replay. This package re-states the documented rules (docs/relabel.md,
docs/reward.md) a second time, small and separately written, and checks a set against them:

* :mod:`goalkit.audit.rowrules`: per-row rules (goal addresses per strategy, steps-to-goal,
  distance -> reached -> reward -> terminal), vectorised over blocks of rows;
* :mod:`goalkit.audit.laws`: the documented law of each strategy's goal step, as a
  probability-integral transform and end-point probabilities;
* :mod:`goalkit.audit.stattests`: the statistical tests and Holm's step-down control;
* :mod:`goalkit.audit.run`: reading a set with h5py and running everything.

Nothing here imports ``goalkit.relabel``, ``goalkit.reward``, ``goalkit.pipeline.chunk`` or
``goalkit.write.rules`` (a test checks the imports, transitively). See docs/audit.md.
"""

from goalkit.audit.run import AuditFeed, AuditReport, audit_into, audit_set, record_audit
from goalkit.audit.stattests import share_power

__all__ = ["AuditFeed", "AuditReport", "audit_into", "audit_set", "record_audit", "share_power"]
