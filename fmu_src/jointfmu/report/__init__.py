"""HTML pages with figures: the characterization report (:mod:`.characterization`)."""
