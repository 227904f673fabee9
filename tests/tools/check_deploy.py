#!/usr/bin/env python3
"""Cross-object checks of the deploy kit (deploy/) that no schema can express; run by
tests/deploy.rs after `kubernetes-validate --strict` has checked every Kubernetes object
against the official schemas (unknown fields, types, required fields).

Usage: check_deploy.py REPO_ROOT

What is left here is what the schemas cannot say: selectors that select the pods, named
ports and ConfigMap references that resolve, the persistent volume for the state, the
security settings the kit promises, env vars posteriord actually reads, the grace period
against the drain budget, resource quantities, and that the Containerfile's USER and EXPOSE
agree with the pod's runAsUser and containerPort. It also hands facts (probe paths, the
ConfigMap's config text) to tests/deploy.rs, which checks them against the real binary.

Prints one JSON object on stdout: {"errors": [...], "facts": {...}}; exits 1 when there are
errors.
"""

import glob
import json
import os
import re
import sys

import yaml

ERRORS = []


def err(where, message):
    ERRORS.append(f"{where}: {message}")


DNS_1123 = re.compile(r"^[a-z0-9]([-a-z0-9]*[a-z0-9])?$")
QUANTITY = re.compile(r"^[0-9]+(\.[0-9]+)?(m|Ki|Mi|Gi|Ti|k|M|G|T)?$")


def load_yaml_docs(root):
    docs = []
    files = sorted(glob.glob(os.path.join(root, "deploy/kubernetes/*.yaml")))
    files += sorted(glob.glob(os.path.join(root, "deploy/prometheus/*.yml")))
    files += [os.path.join(root, "tests/tools/rules_test.yml")]
    for path in files:
        rel = os.path.relpath(path, root)
        try:
            with open(path, encoding="utf-8") as f:
                parsed = [d for d in yaml.safe_load_all(f)]
        except yaml.YAMLError as e:
            err(rel, f"YAML does not parse: {e}")
            continue
        if not parsed or any(d is None for d in parsed):
            err(rel, "empty YAML document")
        docs.extend((rel, d) for d in parsed if d is not None)
    return files, docs


def code_env_vars(root):
    """The POSTERIORD_* variables the code reads (config overrides and logging)."""
    names = set()
    for path in ["src/config/mod.rs", "src/main.rs"]:
        with open(os.path.join(root, path), encoding="utf-8") as f:
            names.update(re.findall(r'"(POSTERIORD_[A-Z_]+)"', f.read()))
    return names


def check_kubernetes(root, docs):
    objects = {}
    facts = {"probes": [], "configs": [], "env": [], "objects": []}
    for rel, d in docs:
        if not rel.startswith("deploy/kubernetes/"):
            continue
        where = rel
        if not isinstance(d, dict):
            err(where, "a Kubernetes document must be a mapping")
            continue
        for field in ["apiVersion", "kind", "metadata"]:
            if field not in d:
                err(where, f"missing {field}")
        name = (d.get("metadata") or {}).get("name")
        if not name:
            err(where, "missing metadata.name")
            continue
        if not DNS_1123.match(name) or len(name) > 63:
            err(where, f"metadata.name {name!r} is not a DNS-1123 label")
        where = f"{rel} {d.get('kind')}/{name}"
        if (d["kind"], name) in objects:
            err(where, "defined twice")
        objects[(d["kind"], name)] = (where, d)
        facts["objects"].append(f"{d['kind']}/{name}")

    def find(kind):
        return [(w, o) for (k, _), (w, o) in objects.items() if k == kind]

    known_env = code_env_vars(root)
    sets = find("StatefulSet")
    if len(sets) != 1:
        err("deploy/kubernetes", f"expected one StatefulSet, found {len(sets)}")
    for where, s in sets:
        spec = s["spec"]
        pod_labels = spec["template"]["metadata"].get("labels", {})
        sel = spec["selector"]["matchLabels"]
        if not sel or any(pod_labels.get(k) != v for k, v in sel.items()):
            err(where, f"selector {sel} does not match the pod labels {pod_labels}")
        svc = objects.get(("Service", spec.get("serviceName")))
        if not svc:
            err(where, f"serviceName {spec.get('serviceName')!r} names no Service in the kit")
        elif svc[1]["spec"].get("clusterIP") != "None":
            err(where, "the governing Service of a StatefulSet must be headless (clusterIP: None)")
        pod = spec["template"]["spec"]
        grace = pod.get("terminationGracePeriodSeconds")
        # The drain is budgeted at 30 s; the grace period must leave margin above it.
        if not isinstance(grace, int) or grace <= 30:
            err(where, f"terminationGracePeriodSeconds {grace!r} must exceed the 30 s drain budget")
        facts["grace_seconds"] = grace
        psc = pod.get("securityContext", {})
        facts["run_as_user"] = psc.get("runAsUser")
        if psc.get("runAsNonRoot") is not True:
            err(where, "pod securityContext.runAsNonRoot must be true")
        if not isinstance(psc.get("runAsUser"), int) or psc.get("runAsUser") == 0:
            err(where, "pod securityContext.runAsUser must be a non-zero uid")
        claims = {t["metadata"]["name"] for t in spec.get("volumeClaimTemplates", [])}
        volumes = {v["name"]: v for v in pod.get("volumes", [])}
        for v in volumes.values():
            cm = v.get("configMap", {}).get("name")
            if cm and ("ConfigMap", cm) not in objects:
                err(where, f"volume {v['name']} names ConfigMap {cm!r}, not in the kit")
        containers = pod.get("containers") or []
        if not containers:
            err(where, "no containers")
        for c in containers:
            cw = f"{where} container {c.get('name')}"
            for field in ["name", "image"]:
                if not c.get(field):
                    err(cw, f"missing {field}")
            if ":" not in c.get("image", "").split("/")[-1] and "@" not in c.get("image", ""):
                err(cw, "image has no tag or digest")
            ports = {p.get("name"): p.get("containerPort") for p in c.get("ports", [])}
            facts["container_ports"] = sorted(ports.values())
            for probe in ["livenessProbe", "readinessProbe"]:
                if probe not in c:
                    err(cw, f"missing {probe}")
                    continue
                get = c[probe].get("httpGet", {})
                if get.get("port") not in ports and get.get("port") not in ports.values():
                    err(cw, f"{probe} port {get.get('port')!r} is not a container port")
                facts["probes"].append({"probe": probe, "path": get.get("path")})
            sc = c.get("securityContext", {})
            if sc.get("readOnlyRootFilesystem") is not True:
                err(cw, "securityContext.readOnlyRootFilesystem must be true")
            if sc.get("allowPrivilegeEscalation") is not False:
                err(cw, "securityContext.allowPrivilegeEscalation must be false")
            if sc.get("capabilities", {}).get("drop") != ["ALL"]:
                err(cw, "securityContext.capabilities.drop must be [ALL]")
            res = c.get("resources", {})
            for part in ["requests", "limits"]:
                for q, v in res.get(part, {}).items():
                    if not QUANTITY.match(v):
                        err(cw, f"resources.{part}.{q} {v!r} is not a quantity")
            for part in ["cpu", "memory"]:
                if part not in res.get("requests", {}):
                    err(cw, f"missing resources.requests.{part}")
            if "memory" not in res.get("limits", {}):
                err(cw, "missing resources.limits.memory")
            mounts = {m["mountPath"]: m["name"] for m in c.get("volumeMounts", [])}
            for path, vol in mounts.items():
                if vol not in volumes and vol not in claims:
                    err(cw, f"mount {path} names volume {vol!r}, neither a volume nor a claim")
            if mounts.get("/var/lib/posteriord") not in claims:
                err(cw, "/var/lib/posteriord must be a volumeClaimTemplate (persistent state)")
            cfg_vol = volumes.get(mounts.get("/etc/posteriord"), {})
            cfg_map = objects.get(("ConfigMap", cfg_vol.get("configMap", {}).get("name")))
            if not cfg_map:
                err(cw, "/etc/posteriord is not mounted from a ConfigMap of the kit")
            elif "posteriord.toml" not in cfg_map[1].get("data", {}):
                err(cw, "the mounted ConfigMap has no posteriord.toml key")
            args = c.get("args", [])
            if args[:1] != ["serve"] or "/etc/posteriord/posteriord.toml" not in args:
                err(cw, f"args {args} do not serve /etc/posteriord/posteriord.toml")
            for e in c.get("env", []):
                facts["env"].append(e["name"])
                if e["name"].startswith("POSTERIORD_") and not (
                    e["name"] in known_env or e["name"].startswith("POSTERIORD_KAFKA_PROP_")
                ):
                    err(cw, f"env {e['name']} is not read by posteriord (src/config, src/main.rs)")
                ref = e.get("valueFrom", {}).get("secretKeyRef")
                if ref:
                    facts["secret_env"] = {"name": e["name"], "secret": ref["name"]}
            if "secret_env" not in facts:
                err(cw, "no env var takes a value from a Secret")
            elif facts["secret_env"]["name"] != "POSTERIORD_KAFKA_PROP_SASL_PASSWORD":
                err(cw, "the Secret must feed POSTERIORD_KAFKA_PROP_SASL_PASSWORD")
        facts["pod_labels"] = pod_labels

    pod_labels = facts.get("pod_labels", {})
    container_ports = {}
    for _, s in sets:
        for c in s["spec"]["template"]["spec"]["containers"]:
            container_ports.update({p["name"]: p["containerPort"] for p in c.get("ports", [])})
    services = find("Service")
    if len(services) < 2:
        err("deploy/kubernetes", "expected a Service and a headless Service")
    for where, svc in services:
        sel = svc["spec"].get("selector", {})
        if not sel or any(pod_labels.get(k) != v for k, v in sel.items()):
            err(where, f"selector {sel} selects no pod of the StatefulSet")
        for p in svc["spec"].get("ports", []):
            t = p.get("targetPort")
            if t not in container_ports and t not in container_ports.values():
                err(where, f"targetPort {t!r} is not a container port")
    pdbs = find("PodDisruptionBudget")
    if len(pdbs) != 1:
        err("deploy/kubernetes", f"expected one PodDisruptionBudget, found {len(pdbs)}")
    for where, pdb in pdbs:
        sel = pdb["spec"].get("selector", {}).get("matchLabels", {})
        if not sel or any(pod_labels.get(k) != v for k, v in sel.items()):
            err(where, f"selector {sel} selects no pod of the StatefulSet")
        if ("maxUnavailable" in pdb["spec"]) == ("minAvailable" in pdb["spec"]):
            err(where, "set exactly one of maxUnavailable and minAvailable")
    for where, cm in find("ConfigMap"):
        for key, text in cm.get("data", {}).items():
            if key.endswith(".toml"):
                facts["configs"].append({"where": f"{where} data.{key}", "text": text})
    if not facts["configs"]:
        err("deploy/kubernetes", "no ConfigMap carries a .toml config")
    return facts


def check_containerfile(root):
    """USER and EXPOSE of the Containerfile's final stage (hadolint lints the file, and
    tests/container.rs inspects the built image; here only what must agree with the pod)."""
    rel = "deploy/container/Containerfile"
    facts = {}
    with open(os.path.join(root, rel), encoding="utf-8") as f:
        text = f.read()
    lines = [
        line.strip()
        for line in re.sub(r"\\\n", " ", text).splitlines()
        if line.strip() and not line.lstrip().startswith("#")
    ]
    final = []
    for line in lines:
        instr, _, arg = line.partition(" ")
        if instr.upper() == "FROM":
            final = []
        final.append((instr.upper(), arg.strip()))
    users = [a for i, a in final if i == "USER"]
    if not users:
        err(rel, "the runtime stage sets no USER")
    else:
        facts["user"] = users[-1]
    facts["expose"] = [int(p.split("/")[0]) for i, a in final if i == "EXPOSE" for p in a.split()]
    return facts


def main():
    root = sys.argv[1]
    files, docs = load_yaml_docs(root)
    facts = {"yaml_files": [os.path.relpath(f, root) for f in files], "yaml_documents": len(docs)}
    try:
        facts["kubernetes"] = check_kubernetes(root, docs)
    except (KeyError, TypeError, AttributeError) as e:
        # kubernetes-validate --strict reports the shape; say where we stopped.
        err("deploy/kubernetes", f"unexpected shape ({e!r}); run kubernetes-validate --strict")
        facts["kubernetes"] = {}
    facts["container"] = check_containerfile(root)
    k8s, ctr = facts["kubernetes"], facts["container"]
    if ctr.get("expose") != k8s.get("container_ports"):
        err("deploy", f"Containerfile EXPOSE {ctr.get('expose')} != containerPort {k8s.get('container_ports')}")
    uid = str(k8s.get("run_as_user"))
    if ctr.get("user") is not None and ctr["user"].split(":")[0] != uid:
        err("deploy", f"Containerfile USER {ctr['user']} != the pod's runAsUser {uid}")
    json.dump({"errors": ERRORS, "facts": facts}, sys.stdout, indent=1)
    print()
    sys.exit(1 if ERRORS else 0)


if __name__ == "__main__":
    main()
