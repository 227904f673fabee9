#!/usr/bin/env python3
"""Checks of the deploy kit (deploy/) that need a YAML parser; run by tests/deploy.rs.

Usage: check_deploy.py REPO_ROOT

Parses every YAML document under deploy/ with PyYAML and checks the Kubernetes objects
against OUR OWN schema (below). This is not kubeconform and not the Kubernetes OpenAPI
schema: kubeconform is not installable here, so this script encodes, by hand, the fields of
the object kinds the kit uses (unknown keys are errors, as in a strict validator) plus
cross-object checks (selectors, named ports, Service and ConfigMap references). It also
checks the Containerfile's structure and the systemd unit's keys.

Prints one JSON object on stdout: {"errors": [...], "facts": {...}}; exits 1 when there are
errors. The facts (probe paths, the ConfigMap's config text, env var names, ...) are checked
further by tests/deploy.rs against the real binary.
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


# ---------------------------------------------------------------------------------------------
# Our schema of the Kubernetes fields the kit uses. A dict maps allowed keys to sub-schemas;
# "str", "int", "bool", "any" are leaf types; [schema] is a list of schema.
# ---------------------------------------------------------------------------------------------
LABELS = {"*": "str"}
METADATA = {"name": "str", "namespace": "str", "labels": LABELS, "annotations": LABELS}
SELECTOR = {"matchLabels": LABELS}
HTTP_GET = {"path": "str", "port": "any", "scheme": "str"}
PROBE = {
    "httpGet": HTTP_GET,
    "initialDelaySeconds": "int",
    "periodSeconds": "int",
    "timeoutSeconds": "int",
    "failureThreshold": "int",
    "successThreshold": "int",
}
QUANTITIES = {"cpu": "str", "memory": "str", "storage": "str"}
CONTAINER_SECURITY = {
    "allowPrivilegeEscalation": "bool",
    "readOnlyRootFilesystem": "bool",
    "runAsNonRoot": "bool",
    "runAsUser": "int",
    "runAsGroup": "int",
    "capabilities": {"drop": ["str"], "add": ["str"]},
    "seccompProfile": {"type": "str"},
}
ENV = {
    "name": "str",
    "value": "str",
    "valueFrom": {
        "secretKeyRef": {"name": "str", "key": "str", "optional": "bool"},
        "configMapKeyRef": {"name": "str", "key": "str", "optional": "bool"},
    },
}
CONTAINER = {
    "name": "str",
    "image": "str",
    "imagePullPolicy": "str",
    "command": ["str"],
    "args": ["str"],
    "ports": [{"name": "str", "containerPort": "int", "protocol": "str"}],
    "env": [ENV],
    "livenessProbe": PROBE,
    "readinessProbe": PROBE,
    "startupProbe": PROBE,
    "resources": {"requests": QUANTITIES, "limits": QUANTITIES},
    "securityContext": CONTAINER_SECURITY,
    "volumeMounts": [{"name": "str", "mountPath": "str", "readOnly": "bool", "subPath": "str"}],
}
POD_SPEC = {
    "terminationGracePeriodSeconds": "int",
    "automountServiceAccountToken": "bool",
    "enableServiceLinks": "bool",
    "serviceAccountName": "str",
    "securityContext": {
        "runAsNonRoot": "bool",
        "runAsUser": "int",
        "runAsGroup": "int",
        "fsGroup": "int",
        "fsGroupChangePolicy": "str",
        "seccompProfile": {"type": "str"},
    },
    "containers": [CONTAINER],
    "volumes": [{"name": "str", "configMap": {"name": "str"}, "secret": {"secretName": "str"}}],
}
PVC_TEMPLATE = {
    "metadata": METADATA,
    "spec": {
        "accessModes": ["str"],
        "storageClassName": "str",
        "resources": {"requests": QUANTITIES},
    },
}
SCHEMAS = {
    ("apps/v1", "StatefulSet"): {
        "apiVersion": "str",
        "kind": "str",
        "metadata": METADATA,
        "spec": {
            "serviceName": "str",
            "replicas": "int",
            "selector": SELECTOR,
            "podManagementPolicy": "str",
            "updateStrategy": {"type": "str"},
            "template": {"metadata": METADATA, "spec": POD_SPEC},
            "volumeClaimTemplates": [PVC_TEMPLATE],
        },
    },
    ("v1", "Service"): {
        "apiVersion": "str",
        "kind": "str",
        "metadata": METADATA,
        "spec": {
            "type": "str",
            "clusterIP": "str",
            "publishNotReadyAddresses": "bool",
            "selector": LABELS,
            "ports": [{"name": "str", "port": "int", "targetPort": "any", "protocol": "str"}],
        },
    },
    ("v1", "ConfigMap"): {
        "apiVersion": "str",
        "kind": "str",
        "metadata": METADATA,
        "data": {"*": "str"},
    },
    ("policy/v1", "PodDisruptionBudget"): {
        "apiVersion": "str",
        "kind": "str",
        "metadata": METADATA,
        "spec": {"maxUnavailable": "any", "minAvailable": "any", "selector": SELECTOR},
    },
}
LEAF_TYPES = {"str": str, "int": int, "bool": bool}
DNS_1123 = re.compile(r"^[a-z0-9]([-a-z0-9]*[a-z0-9])?$")
QUANTITY = re.compile(r"^[0-9]+(\.[0-9]+)?(m|Ki|Mi|Gi|Ti|k|M|G|T)?$")


def check_shape(value, schema, where):
    if schema == "any":
        return
    if isinstance(schema, str):
        want = LEAF_TYPES[schema]
        # bool is a subclass of int in Python; an int field must not hold true/false.
        if not isinstance(value, want) or (want is int and isinstance(value, bool)):
            err(where, f"expected {schema}, got {type(value).__name__} {value!r}")
        return
    if isinstance(schema, list):
        if not isinstance(value, list):
            err(where, f"expected a list, got {type(value).__name__}")
            return
        for i, item in enumerate(value):
            check_shape(item, schema[0], f"{where}[{i}]")
        return
    if not isinstance(value, dict):
        err(where, f"expected a mapping, got {type(value).__name__}")
        return
    for key, sub in value.items():
        if key in schema:
            check_shape(sub, schema[key], f"{where}.{key}")
        elif "*" in schema:
            check_shape(sub, schema["*"], f"{where}.{key}")
        else:
            err(where, f"unknown field {key!r} (our schema; a typo?)")


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
        key = (d.get("apiVersion"), d.get("kind"))
        where = f"{rel} {d.get('kind')}/{name}"
        if key not in SCHEMAS:
            err(where, f"apiVersion/kind {key} is not one our schema knows")
            continue
        check_shape(d, SCHEMAS[key], where)
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
    rel = "deploy/container/Containerfile"
    facts = {}
    with open(os.path.join(root, rel), encoding="utf-8") as f:
        text = f.read()
    # Join continuation lines, drop comments.
    lines = []
    for line in re.sub(r"\\\n", " ", text).splitlines():
        if line.strip() and not line.lstrip().startswith("#"):
            lines.append(line.strip())
    instrs = [(l.split(None, 1)[0].upper(), l.split(None, 1)[1] if " " in l else "") for l in lines]
    froms = [a for i, a in instrs if i == "FROM"]
    if len(froms) < 2:
        err(rel, "expected a multi-stage build (two FROM lines)")
    stages = [a.split()[-1] for a in froms if " AS " in a.upper()]
    final = []
    for i, a in instrs:
        if i == "FROM":
            final = []
        final.append((i, a))
    users = [a for i, a in final if i == "USER"]
    if not users or users[-1].split(":")[0] in ("0", "root"):
        err(rel, "the runtime stage must set a non-root USER")
    for i, a in instrs:
        if i in ("ENTRYPOINT", "CMD"):
            try:
                v = json.loads(a)
                if not isinstance(v, list):
                    raise ValueError
            except ValueError:
                err(rel, f"{i} must be in exec form (a JSON array), so no shell is needed: {a}")
                continue
            facts[i.lower()] = v
        if i == "COPY" and "--from=" not in a:
            for src in a.split()[:-1]:
                if not src.startswith("--") and not os.path.exists(os.path.join(root, src)):
                    err(rel, f"COPY source {src} does not exist in the repository")
        if i == "COPY" and "--from=" in a:
            stage = re.search(r"--from=(\S+)", a).group(1)
            if stage not in stages:
                err(rel, f"COPY --from={stage} names no build stage")
        if i == "VOLUME":
            facts["volumes"] = json.loads(a)
        if i == "EXPOSE":
            facts["expose"] = [int(p.split("/")[0]) for p in a.split()]
        if i == "STOPSIGNAL":
            facts["stopsignal"] = a
        if i == "RUN" and "cargo build" in a and "--release" not in a:
            err(rel, "cargo build must be --release")
    for want in ["/etc/posteriord", "/var/lib/posteriord"]:
        if want not in facts.get("volumes", []):
            err(rel, f"VOLUME must declare {want}")
    if facts.get("stopsignal") != "SIGTERM":
        err(rel, "STOPSIGNAL must be SIGTERM (posteriord drains on it)")
    if facts.get("cmd", [])[:1] != ["serve"] or "/etc/posteriord/posteriord.toml" not in facts.get("cmd", []):
        err(rel, "CMD must serve /etc/posteriord/posteriord.toml")
    if not facts.get("entrypoint", [""])[0].endswith("/posteriord"):
        err(rel, "ENTRYPOINT must run the posteriord binary")
    return facts


def main():
    root = sys.argv[1]
    files, docs = load_yaml_docs(root)
    facts = {"yaml_files": [os.path.relpath(f, root) for f in files], "yaml_documents": len(docs)}
    facts["kubernetes"] = check_kubernetes(root, docs)
    facts["container"] = check_containerfile(root)
    k8s, ctr = facts["kubernetes"], facts["container"]
    if ctr.get("expose") and k8s.get("container_ports") and ctr["expose"] != k8s["container_ports"]:
        err("deploy", f"Containerfile EXPOSE {ctr['expose']} != containerPort {k8s['container_ports']}")
    json.dump({"errors": ERRORS, "facts": facts}, sys.stdout, indent=1)
    print()
    sys.exit(1 if ERRORS else 0)


if __name__ == "__main__":
    main()
