"""graft for notebooks and scripts.

    import graft
    run = graft.load_run("runs/iit")          # spec, metrics, result, the network as torch.nn.Module
    logits = run.module(run.encode_many([{"origin": "north", "dest": "north", ...}]))
    out = graft.interchange(run.module, base, source, run.sites(["local"]))
    graft.iia(run.module, triples, run.set_sites(), classes=run.classes, encode=run.encode)

    client = graft.Client("127.0.0.1:7070", token="...")   # the gRPC API of graftd
    for event in client.watch("j-4"): ...

load_run, interchange and iia need Debian's python3-torch and python3-yaml; Client needs
python3-grpcio and the stubs the build generates from proto/ (cmake target graft_python, which
assembles this package with them in build/python; put that directory on sys.path).
"""

from graft.run import Run, load_run
from graft.networks import NETWORK_KINDS, interchange
from graft.measures import iia, wilson
from graft.client import Client, GraftError

__all__ = ["Run", "load_run", "NETWORK_KINDS", "interchange", "iia", "wilson", "Client", "GraftError"]
