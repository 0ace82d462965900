"""Analysis of a parameter set: closed-form amplitude curves, ring-downs and their Hilbert
identification (:mod:`.characterize`), equivalent linear state-space models (:mod:`.linear`)."""
