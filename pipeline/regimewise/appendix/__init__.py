"""The audit appendix of a run (``<results>/appendix/``): what was produced (manifest), with what software
(environment), under which settings (resolved protocol, seed streams) and by which command, and how the run maps to
the reporting checklists journals ask for (checklist); and the commands that check it: verify a run by rerunning
it, compare two runs, bundle a run into one archive.
"""
