"""The lab's web page: the queue, each order's story with pictures of the lens, decisions by click.

:mod:`lenslane.web.page` renders the order page (also written to a file by
``lenslane explain --html``); :mod:`lenslane.web.app` is the server of
``lenslane serve``.
"""
