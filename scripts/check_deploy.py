"""Checks that the rendered manifests agree with the server's effective settings.

Arguments: the output of `kubectl kustomize deploy/kubernetes` and of `switchyard config check`
on the Secret's config with the ConfigMap's variables. Exits 1 naming every disagreement.
"""

import re
import sys

import yaml

docs = [d for d in yaml.safe_load_all(open(sys.argv[1])) if d]
effective = open(sys.argv[2]).read()
problems = []


def setting(section, key):
    block = re.search(r"^\[" + re.escape(section) + r"\]\n(.*?)(?=^\[|\Z)", effective, re.S | re.M)
    if not block:
        problems.append(f"no [{section}] in the effective settings")
        return None
    m = re.search(r"^" + re.escape(key) + r" = (.+)$", block.group(1), re.M)
    if not m:
        problems.append(f"no {section}.{key} in the effective settings")
        return None
    return m.group(1).strip().strip('"').replace("_", "")


def one(kind):
    found = [d for d in docs if d["kind"] == kind]
    if len(found) != 1:
        problems.append(f"expected one {kind}, found {len(found)}")
        return {}
    return found[0]


deployment = one("Deployment")
service = one("Service")
autoscaler = one("HorizontalPodAutoscaler")
pod = deployment["spec"]["template"]["spec"]
container = pod["containers"][0]

# Probes on our health endpoints, on the port the server listens on.
listen_port = int(setting("server", "listen").rsplit(":", 1)[1])
ports = {p["name"]: p["containerPort"] for p in container["ports"]}
if ports.get("http") != listen_port:
    problems.append(f"containerPort http is {ports.get('http')}, the server listens on {listen_port}")
for probe, path in [("readinessProbe", "/health/ready"), ("livenessProbe", "/health/live")]:
    got = container.get(probe, {}).get("httpGet", {})
    if got.get("path") != path or got.get("port") not in ("http", listen_port):
        problems.append(f"{probe} is {got}, expected GET {path} on the http port")
if service["spec"]["ports"][0]["targetPort"] not in ("http", listen_port):
    problems.append("the Service does not target the http port")

# The drain fits the grace period: preStop, then the server's shutdown grace, then a margin.
pre_stop = container["lifecycle"]["preStop"]["sleep"]["seconds"]
grace_ms = int(setting("server", "shutdown_grace_ms"))
period = pod["terminationGracePeriodSeconds"]
if period < pre_stop + grace_ms / 1000 + 5:
    problems.append(
        f"terminationGracePeriodSeconds {period} < preStop {pre_stop} s + shutdown_grace_ms "
        f"{grace_ms} ms + 5 s"
    )

# Memory requested covers the residency budgets (the base weights and overhead come on top).
def mib(quantity):
    m = re.fullmatch(r"(\d+)(Mi|Gi)", quantity)
    return int(m.group(1)) * (1024 if m.group(2) == "Gi" else 1)


budgets = int(setting("residency", "factor_budget_bytes")) + int(
    setting("residency", "merged_budget_bytes")
)
requested = mib(container["resources"]["requests"]["memory"]) * 2**20
if requested < budgets:
    problems.append(f"memory request {requested} bytes is below the residency budgets {budgets}")
if mib(container["resources"]["limits"]["memory"]) * 2**20 < requested:
    problems.append("memory limit below the request")

# The autoscaler scales this Deployment, which has a CPU request to measure against.
target = autoscaler["spec"]["scaleTargetRef"]
if (target["kind"], target["name"]) != ("Deployment", deployment["metadata"]["name"]):
    problems.append(f"the autoscaler targets {target}")
if "cpu" not in container["resources"]["requests"]:
    problems.append("no CPU request for the autoscaler's utilisation target")

# Config from the Secret, settings from the ConfigMap, the replica named by the pod.
mounted = {v["name"]: v for v in pod["volumes"]}
if "secret" not in mounted.get("config", {}):
    problems.append("the config file is not mounted from a Secret")
if not any("configMapRef" in e for e in container.get("envFrom", [])):
    problems.append("no settings from a ConfigMap")
names = {e["name"] for e in container.get("env", [])}
if "SWITCHYARD_SERVER_REPLICA" not in names:
    problems.append("the replica is not named (SWITCHYARD_SERVER_REPLICA)")

if problems:
    for p in problems:
        print("check-deploy:", p, file=sys.stderr)
    sys.exit(1)
