"""An independent JACK tap in its own process (one libjack client per server and process).

Usage: ``python tests/tapprocess.py SERVER PORT OUT.npy``. Waits for ``PORT`` to appear, then
records it with :class:`liveshape.rigs.jackrig.JackTap`. Prints ``ready`` once its client is
active, ``connected`` once recording the port; every line read on stdin is answered with the
number of frames recorded so far; at EOF on stdin the recording is saved to ``OUT.npy``.
"""

from __future__ import annotations

import sys
import threading
import time

import numpy as np


def main() -> int:
    import jack

    from liveshape.rigs.jackrig import JackTap

    server, port, out = sys.argv[1:4]
    tap = JackTap([port], capacity_s=300.0, client_name="liveshape-tapproc",
                  server_name=server).start()
    probe = jack.Client("liveshape-tapprobe", servername=server, no_start_server=True)
    print("ready", flush=True)

    def connect() -> None:
        while True:
            if any(p.name == port for p in probe.get_ports()):
                tap.connect()
                print("connected", flush=True)
                return
            time.sleep(0.005)

    threading.Thread(target=connect, daemon=True).start()
    for _line in sys.stdin:
        print(tap.frames, flush=True)
    np.save(out, tap.data())
    tap.stop()
    probe.close()
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
