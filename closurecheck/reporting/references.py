"""What a run's score is measured against (summary.json's ``score.reference``).

A light module of its own, without scoring's imports (scikit-learn, the
candidates stage: about 1.5 s in a fresh process), so that the report's
picture worker can tell a reference score from a true one.
"""

REFERENCE_TRUTH = "truth"
REFERENCE_VERDICTS = "verdicts"
REFERENCE_NOTE = ("The log has no ground truth: the proposals are scored against this run's own verdicts "
                  "(verified = right). That is a reference, not the truth: the figures measure agreement with "
                  "the verifier, whose verdicts are statistical decisions and can be wrong.")
