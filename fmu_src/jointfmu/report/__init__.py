"""HTML pages with figures, laid out by the Jinja2 templates in ``templates/``: the
characterization report (:mod:`.characterization`) and the system page of a sweep
(:mod:`.system`); :mod:`.render` renders them."""
