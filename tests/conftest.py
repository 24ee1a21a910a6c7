"""Shared pytest fixtures.

Each fixture module lives beside the tests and is registered here by import;
add new fixture modules the same way.

- ``broker.py``: a real mosquitto on loopback (``broker``, ``broker_factory``,
  ``tls_files``) and a collecting subscriber.
"""

from broker import broker, broker_factory, tls_files  # noqa: F401  (registers the fixtures)
