"""microsim: individual-level health microsimulation with a Markov backbone."""

__version__ = "0.1.0"

CAUTION = ("Caution: microsim supports analysis by qualified people. Its results are not "
           "clinical advice; check them against local guidance and review them before they "
           "inform decisions about patients or funding.")
