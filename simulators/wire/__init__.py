"""Wire simulators: shotpair's simulated instruments served over the wires real instruments use.

SCPI devices (scpi_device.py, devices.py) on raw TCP sockets at 127.0.0.1 (tcp_server.py), assembled from
a bench file into one running bench by launcher.py (``shotpair simulate``). Nothing here touches real
hardware or listens beyond 127.0.0.1. Submodules are imported on use, so ``import shotpair.simulators.wire``
stays cheap.
"""

__all__ = ["scpi_device", "devices", "tcp_server", "launcher"]
