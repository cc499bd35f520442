"""pyvisa with the pure-Python pyvisa-py backend against a SCPI instrument over a raw socket.

Measures, the same way as the Rust side of `cargo bench -p halfwave-drivers --bench
visa_compare` (which starts the instrument and runs this script):
- an `*IDN?` round trip;
- one configuration step as Halfwave's source driver performs it: `FREQuency <f>`, read back
  `FREQuency?`, `SYSTem:ERRor?`, `*OPC?`, `SYSTem:ERRor?`.
Each figure is the median over batches of the mean time per operation.

pyvisa-py leaves Nagle's algorithm on for socket sessions unless told otherwise, and a command
followed at once by a query then waits for the peer's delayed acknowledgement (tens of ms). The
comparison therefore sets TCP_NODELAY on pyvisa-py's socket, as a careful user would (our client
sets it too; pyvisa-py 0.8 refuses VI_ATTR_TCPIP_NODELAY through set_visa_attribute, so it is set
on the session's socket object); the configuration step with pyvisa-py's default is reported
beside.

Needs: pip install pyvisa pyvisa-py
Usage: python3 visa_compare.py TCPIP::127.0.0.1::PORT::SOCKET [BATCHES] [PER_BATCH]
Prints one JSON object: {"idn_us": .., "config_step_us": .., "config_step_default_us": ..,
"pyvisa": .., "pyvisa_py": ..}.
"""

import json
import statistics
import sys
import time

import pyvisa

try:
    from importlib.metadata import version
except ImportError:  # pragma: no cover
    version = None


def median_per_operation(operation, batches, per_batch):
    operation(0)  # warm up: first connection effects, caches
    means = []
    for b in range(batches):
        started = time.perf_counter()
        for i in range(per_batch):
            operation(b * per_batch + i)
        means.append((time.perf_counter() - started) / per_batch)
    return statistics.median(means) * 1e6


def main():
    resource = sys.argv[1]
    batches = int(sys.argv[2]) if len(sys.argv) > 2 else 30
    per_batch = int(sys.argv[3]) if len(sys.argv) > 3 else 50
    manager = pyvisa.ResourceManager("@py")
    inst = manager.open_resource(resource, read_termination="\n", write_termination="\n")
    inst.timeout = 5000

    def idn(_):
        inst.query("*IDN?")

    def config_step(i):
        f = 1e9 + (i % 1000) * 1e3
        inst.write("FREQuency %r" % f)
        actual = float(inst.query("FREQuency?"))
        if abs(actual - f) > 1.0:
            raise SystemExit("read back %r for %r" % (actual, f))
        if not inst.query("SYSTem:ERRor?").startswith("0"):
            raise SystemExit("the instrument reported an error")
        inst.query("*OPC?")
        if not inst.query("SYSTem:ERRor?").startswith("0"):
            raise SystemExit("the instrument reported an error")

    default_step = median_per_operation(config_step, max(3, batches // 10), per_batch // 5 or 1)
    try:
        inst.set_visa_attribute(pyvisa.constants.VI_ATTR_TCPIP_NODELAY, True)
    except Exception:  # pyvisa-py 0.8: not settable through VISA; set on its socket
        import socket

        session = manager.visalib.sessions[inst.session]
        session.interface.setsockopt(socket.IPPROTO_TCP, socket.TCP_NODELAY, 1)
    result = {
        "idn_us": median_per_operation(idn, batches, per_batch),
        "config_step_us": median_per_operation(config_step, batches, per_batch),
        "config_step_default_us": default_step,
        "pyvisa": version("pyvisa") if version else "unknown",
        "pyvisa_py": version("pyvisa-py") if version else "unknown",
    }
    inst.close()
    print(json.dumps(result))


if __name__ == "__main__":
    main()
