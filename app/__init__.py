"""rawproof: measure the traces of hidden processing in candidate MRI datasets.

A research aid, not a medical device.
"""

__version__ = "0.1.0"

CAUTION = (
    "rawproof is a research aid, not a medical device. Its findings are estimates "
    "for research data vetting; data use follows your lab's data-use agreements "
    "and local rules."
)
