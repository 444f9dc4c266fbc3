"""The hostile corpus: a script-generated set of bad (and awkward but valid) inputs for every command.

``corpus.build_corpus(folder)`` writes the inputs into ``folder`` and returns the cases, each with its
expected outcome; ``runner`` runs them as subprocesses under a memory and time limit. Nothing large is
committed: every input is made at test time from the sample cell and photos.

Run it by hand for the figures (counts by outcome, worst memory and time)::

    python -m tests.app.hostile [--workers 2] [--only NAME-FRAGMENT]
"""
