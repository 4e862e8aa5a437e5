"""Reliability checks of the whole tracer, with figures (``tracer reliability``).

- :mod:`.matrix` — every simulated fault in every phase of a run, through ``tracer run``;
- :mod:`.crash` — ``tracer run`` killed with SIGKILL at seeded random moments;
- :mod:`.fuzz_files` — hostile protocol files, bench profiles and CSV curves (hypothesis);
- :mod:`.fuzz_wire` — spoilt SCPI replies and binary blocks against the SMU driver;
- :mod:`.load` — eight benches at once, own logbooks and one shared logbook;
- :mod:`.report` — all of it at quick or full size, the figures and the verdict;
- :mod:`.procs`, :mod:`.protocols` — the programs driven and the protocols they run.

These drive the product from outside, as programs and over the wire, against the
simulated bench; nothing here is imported by the product. See docs/reliability.md.
"""
