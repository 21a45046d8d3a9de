"""oddsmill: an online logistic-regression daemon.

The learner (`oddsmill.learner`) learns each labelled event by stochastic gradient ascent on the
log-likelihood; the reference fit (`oddsmill.reference`) maximises the same objective by Newton's
method; storage, the replay engine and the command line sit around them.
"""

from __future__ import annotations

__version__ = "0.1.0"
