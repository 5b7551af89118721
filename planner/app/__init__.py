"""What each command does with files.

:mod:`.workflow` (check a protocol, make a starting design, plan and record
a step, replay a record), :mod:`.campaign` (the files a record names:
checks, confined reads, writes staged under the log's lock), :mod:`.audit`
(operator names, campaign verification, corrections), :mod:`.history` (the calibration a campaign has
earned), :mod:`.review` (the reviewer's summary of a log), :mod:`.demo`,
:mod:`.simulate_options` (the simulate command's options), :mod:`.fileio`
(atomic writes, CSV) and :mod:`.textable` (terminal tables).

Nothing is imported here: the command line imports only what the command
it runs needs, so that ``guardband --help`` starts quickly.
"""

__all__ = ["workflow", "campaign", "audit", "history", "review", "demo", "simulate_options", "fileio", "textable"]
