"""The review page: a local web page to go through flagged frames, label them and see what
each baseline version changes. :mod:`.data` reads a results folder; :mod:`.server` serves it."""
