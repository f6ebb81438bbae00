"""The commands: one module each, options dataclass in, report dataclass out.

Each command reads its inputs, checks them before any work, runs the engine
through the model's kind (:mod:`seqstate.kinds`), writes its outputs through
:mod:`seqstate.io.atomic` and returns a report; it never parses ``sys.argv`` and
says nothing on stderr except through :mod:`seqstate.log`.  :mod:`seqstate.cli`
turns options into the options dataclass and the report into the summary line.
"""
