"""Helper of scripts/check-dashboard-live: writes the sidecar's configuration, waits for it to be
ready, and runs every dashboard query and alert rule against a real Prometheus.

Usage (by that script): dashboard_live.py config|wait-ready|checks ARGS...
"""
import json, math, os, re, sys, time, tomllib
import urllib.error, urllib.parse, urllib.request

cmd, args = sys.argv[1], sys.argv[2:]


def toml_value(v):
    if isinstance(v, bool):
        return "true" if v else "false"
    if isinstance(v, (int, float)):
        return repr(v)
    if isinstance(v, str):
        return json.dumps(v)
    if isinstance(v, list):
        return "[" + ", ".join(toml_value(x) for x in v) + "]"
    if isinstance(v, dict):
        return "{ " + ", ".join(f"{toml_key(k)} = {toml_value(x)}" for k, x in v.items()) + " }"
    raise SystemExit(f"cannot write {v!r} as TOML")


def toml_key(k):
    return k if re.fullmatch(r"[A-Za-z0-9_-]+", k) else json.dumps(k)


def write_config(out, brokers, suffix, metrics_port, demo_toml):
    # Topics and group are unique to this run; the experiments are the demo's, because the
    # demo's traffic generator feeds them.
    demo = tomllib.load(open(demo_toml, "rb"))
    base = f"apportion-live-{suffix}"
    lines = [
        "[kafka]",
        f"brokers = {toml_value(brokers)}",
        f"group_id = {toml_value(base)}",
        f"input_topic = {toml_value(base + '.events')}",
        f"weights_topic = {toml_value(base + '.weights')}",
        f"state_topic = {toml_value(base + '.state')}",
        f"dead_letter_topic = {toml_value(base + '.dead-letter')}",
        f"control_topic = {toml_value(base + '.control')}",
        "create_topics = true",
        "topic_partitions = 3",
        "replication_factor = 1",
        "",
        "[publish]",
        "interval_seconds = 0.5",
        "",
        "[snapshot]",
        "interval_seconds = 1.0",
        "",
        "[metrics]",
        f'listen = "127.0.0.1:{metrics_port}"',
        "",
        "[log]",
        'level = "info"',
        "",
        "[defaults]",
    ]
    lines += [f"{toml_key(k)} = {toml_value(v)}" for k, v in demo.get("defaults", {}).items()]
    for exp in demo.get("experiments", []):
        lines += ["", "[[experiments]]"]
        lines += [f"{toml_key(k)} = {toml_value(v)}" for k, v in exp.items()]
    open(out, "w").write("\n".join(lines) + "\n")
    # Printed for the caller: the topic names the generator must use.
    print(base + ".events", base + ".weights")


def http_get(url, timeout=5):
    with urllib.request.urlopen(url, timeout=timeout) as r:
        return r.status, r.read()


def wait_ready(url, pid, timeout):
    deadline = time.monotonic() + float(timeout)
    last = "no answer"
    while time.monotonic() < deadline:
        try:
            os.kill(int(pid), 0)
        except ProcessLookupError:
            raise SystemExit("the sidecar exited")
        try:
            status, _ = http_get(url, timeout=2)
            if status == 200:
                return
        except urllib.error.HTTPError as e:
            last = f"HTTP {e.code}"
        except OSError as e:
            last = str(e)
        time.sleep(0.5)
    raise SystemExit(f"{url} did not answer 200 within {timeout} s (last: {last})")


class Prom:
    def __init__(self, base):
        self.base = base.rstrip("/")

    def api(self, path, **params):
        query = urllib.parse.urlencode(params, doseq=True)
        try:
            status, body = http_get(f"{self.base}{path}?{query}", timeout=10)
        except urllib.error.HTTPError as e:
            body = e.read()
        except OSError as e:
            raise RuntimeError(f"Prometheus did not answer: {e}")
        reply = json.loads(body)
        if reply.get("status") != "success":
            raise RuntimeError(f"{reply.get('errorType')}: {reply.get('error')}")
        return reply["data"]

    def instant(self, expr):
        return self.api("/api/v1/query", query=expr, time=f"{time.time():.3f}")["result"]

    def window(self, expr, seconds=60, step=1):
        now = time.time()
        return self.api("/api/v1/query_range", query=expr, start=f"{now - seconds:.3f}",
                        end=f"{now:.3f}", step=str(step))["result"]


def finite(v):
    try:
        return math.isfinite(float(v))
    except ValueError:
        return False


def describe_instant(result):
    good = [s for s in result if finite(s["value"][1])]
    if not result:
        return None, "no series"
    if not good:
        return None, f"{len(result)} series, none with a finite value"
    return f"{len(good)} series", None


def describe_range(result):
    # A time series panel draws a line only from two points on.
    good = [s for s in result if sum(finite(v) for _, v in s["values"]) >= 2]
    if not result:
        return None, "no series in the last minute"
    if not good:
        return None, f"{len(result)} series, none with two finite points in the last minute"
    points = sum(len(s["values"]) for s in good)
    return f"{len(good)} series, {points} points", None


def panels(items):
    for p in items:
        yield p
        yield from panels(p.get("panels", []))


def regex_escape(value):
    # The dashboard's variables allow several values, so Grafana escapes regex characters in
    # each value, with backslashes doubled for the PromQL string literal.
    return re.sub(r"([\\^$.|?*+()\[\]{}])", r"\\\\\1", value)


def rule_groups(path):
    text = open(path).read()
    try:
        import yaml
    except ImportError:
        groups, current = {}, None
        for line in text.splitlines():
            m = re.match(r"\s*- name:\s*(\S+)", line)
            if m:
                current = groups.setdefault(m.group(1), [])
            m = re.match(r"\s*- (?:alert|record):\s*(\S+)", line)
            if m and current is not None:
                current.append((m.group(1), None))
        return groups
    return {g["name"]: [(r.get("alert") or r.get("record"), r["expr"]) for r in g.get("rules", [])]
            for g in yaml.safe_load(text)["groups"]}


def run_checks(prom_url, target, experiment, dashboard, alerts, data_timeout, checks_timeout, counts_file):
    prom = Prom(prom_url)
    passed = failed = 0

    def report(ok, name, detail):
        nonlocal passed, failed
        if ok:
            passed += 1
            print(f"ok    {name}" + (f" ({detail})" if detail else ""), flush=True)
        else:
            failed += 1
            print(f"FAIL  {name}", flush=True)
            for line in str(detail).splitlines():
                print(f"        {line}", flush=True)

    def until(deadline, attempt):
        """Repeats attempt() (which returns (detail, error)) until it succeeds or time is up."""
        error = "not tried"
        while True:
            try:
                detail, error = attempt()
            except RuntimeError as e:
                detail, error = None, str(e)
            if error is None:
                return True, detail
            if time.monotonic() >= deadline:
                return False, error
            time.sleep(1)

    def finish():
        open(counts_file, "w").write(f"{passed} {failed}\n")
        sys.exit(0)

    # Data first: weights published for the experiment and several scrapes of the sidecar.
    job = f'job="apportion",instance="{target}"'
    deadline = time.monotonic() + float(data_timeout)

    def scraped():
        r = prom.instant(f"count_over_time(up{{{job}}}[1m]) >= 10 and on () (up{{{job}}} == 1)")
        return (f"{r[0]['value'][1]} scrapes", None) if r else (None, "fewer than 10 successful scrapes")

    ok, detail = until(deadline, scraped)
    report(ok, f"Prometheus scrapes the sidecar at {target}", detail)

    def published():
        r = prom.instant(f'apportion_weights_version{{{job},experiment="{experiment}"}} > 0')
        return (f"version {r[0]['value'][1]}", None) if r else (None, f"no weights published for {experiment}")

    ok, detail = until(deadline, published)
    report(ok, f"weights of {experiment} published and scraped", detail)
    if failed:
        finish()

    d = json.load(open(dashboard))
    deadline = time.monotonic() + float(checks_timeout)

    # Template variables, as Grafana resolves label_values(metric, label).
    values = {}
    for var in d.get("templating", {}).get("list", []):
        if var.get("type") != "query":
            continue
        q = var.get("query")
        q = q.get("query") if isinstance(q, dict) else q
        m = re.fullmatch(r"\s*label_values\(\s*([^,\s]+)\s*,\s*(\w+)\s*\)\s*", q or "")
        if not m:
            report(False, f"variable {var['name']}", f"query {q!r} is not label_values(metric, label)")
            continue
        metric, label = m.groups()

        def attempt(metric=metric, label=label, name=var["name"]):
            now = time.time()
            got = prom.api(f"/api/v1/label/{label}/values", **{"match[]": metric},
                           start=f"{now - 3600:.3f}", end=f"{now:.3f}")
            values[name] = got
            if not got:
                return None, "no values"
            return ", ".join(got), None

        ok, detail = until(deadline, attempt)
        report(ok, f"variable {var['name']}: {q}", detail)

    for name, want in (("experiment", experiment), ("instance", target)):
        if name in values and want not in values[name]:
            report(False, f"variable {name} lists {want}", f"it lists {values[name]}")

    subst = {
        "$__rate_interval": "30s",
        "$__interval": "5s",
        "$__range": "1m",
        "$experiment": regex_escape(experiment),
        "$instance": regex_escape(target),
    }

    for p in panels(d.get("panels", [])):
        for t in p.get("targets", []):
            expr = t.get("expr", "")
            for k, v in sorted(subst.items(), key=lambda kv: -len(kv[0])):
                expr = expr.replace("${" + k[1:] + "}", v).replace(k, v)
            leftover = re.findall(r"\$\{?\w+", expr)
            name = f"panel {p.get('id')} {p.get('title')!r} {t.get('refId')}"
            if leftover:
                report(False, name, f"no value for {', '.join(leftover)} in {expr}")
                continue
            instant = bool(t.get("instant")) and not t.get("range", False)

            def attempt(expr=expr, instant=instant):
                if instant:
                    return describe_instant(prom.instant(expr))
                return describe_range(prom.window(expr))

            ok, detail = until(deadline, attempt)
            kind = "instant" if instant else "range"
            report(ok, f"{name} [{kind}]", detail if ok else f"{detail}\nquery: {expr}")

    # Rules: every group of the file loaded, every rule evaluated without error.
    groups = rule_groups(alerts)

    def loaded():
        got = {g["name"]: g for g in prom.api("/api/v1/rules")["groups"]}
        missing = sorted(set(groups) - set(got))
        if missing:
            return None, f"groups not loaded: {', '.join(missing)}"
        return got, None

    ok, got = until(deadline, loaded)
    if not ok:
        report(False, f"rule groups of {alerts} loaded", got)
        finish()
    for gname, rules in groups.items():
        def attempt(gname=gname, rules=rules):
            g = {x["name"]: x for x in prom.api("/api/v1/rules")["groups"]}[gname]
            have = {r["name"]: r for r in g["rules"]}
            bad = []
            for rname, _ in rules:
                r = have.get(rname)
                if r is None:
                    bad.append(f"{rname}: not loaded")
                elif r.get("health") != "ok":
                    bad.append(f"{rname}: health {r.get('health')} {r.get('lastError', '')}".rstrip())
            if bad:
                return None, "\n".join(bad)
            return f"{len(rules)} rules, health ok", None

        ok, detail = until(deadline, attempt)
        report(ok, f"rule group {gname}", detail)

    # Every series an alert reads exists for this target, so no rule is silently blind.
    for gname, rules in groups.items():
        for rname, expr in rules:
            if expr is None:
                continue
            metrics = sorted(set(re.findall(r"\bapportion_[a-z_]+\b", expr))
                             | set(re.findall(r"\b(up)\s*\{", expr)))

            def attempt(metrics=metrics):
                absent = [m for m in metrics if not prom.instant(f"count({m}{{{job}}})")]
                if absent:
                    return None, f"no series: {', '.join(absent)}"
                return ", ".join(metrics), None

            ok, detail = until(deadline, attempt)
            report(ok, f"alert {rname} reads existing series", detail)

    finish()


if cmd == "config":
    write_config(*args)
elif cmd == "wait-ready":
    wait_ready(*args)
elif cmd == "checks":
    run_checks(*args)
else:
    raise SystemExit(f"unknown helper command {cmd}")
