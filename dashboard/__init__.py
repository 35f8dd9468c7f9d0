"""The cloudsieve dashboard: a Panel app over the headless core (:mod:`cloudsieve`).

``dashboard.model`` is a param model over :class:`cloudsieve.session.Session`, ``dashboard.views``
render it, ``dashboard.app`` assembles the page and serves it.
"""
