"""Independent clients for outrider's web part (tests/web.rs).

  web_client.py request METHOD URL [--header 'K: V']... [--form urlencoded|multipart]
                [--field K=V]...
      One HTTP request with Python's urllib (redirects are NOT followed, so
      a redirect shows as its own status). --form builds the body: urlencoded
      with urllib.parse.urlencode, multipart with urllib3's
      encode_multipart_formdata (RFC 7578), neither with outrider's code.
      Prints JSON {"status", "headers": {lower-case name: value}, "body"}.

  web_client.py metrics URL [--header 'K: V']...
      Fetches the Prometheus text exposition and parses it with
      prometheus_client's own parser (text_string_to_metric_families).
      Prints JSON {"content_type", "families": {name: {"type", "samples":
      [[sample name, labels, value]]}}}. A parse error exits non-zero.

  web_client.py browse --base URL --site ID --out DIR
      Drives Debian's Chromium through chromium-driver with Selenium:
      loads the overview and one site page at desktop and phone width,
      counts what the DOM holds (map markers, notices, chart panels),
      checks that no resource was fetched besides the page itself, and
      saves PNG screenshots in DIR. Prints JSON with the counts.
"""

import argparse
import json
import os
import sys
import urllib.error
import urllib.parse
import urllib.request


class NoRedirect(urllib.request.HTTPRedirectHandler):
    def redirect_request(self, req, fp, code, msg, headers, newurl):
        return None


def http(method, url, headers, data=None):
    req = urllib.request.Request(url, data=data, method=method)
    for h in headers:
        k, v = h.split(":", 1)
        req.add_header(k.strip(), v.strip())
    opener = urllib.request.build_opener(NoRedirect)
    try:
        with opener.open(req, timeout=30) as r:
            return r.status, dict((k.lower(), v) for k, v in r.headers.items()), r.read()
    except urllib.error.HTTPError as e:
        return e.code, dict((k.lower(), v) for k, v in e.headers.items()), e.read()


def cmd_request(a):
    headers = list(a.header)
    data = None
    fields = [tuple(f.split("=", 1)) for f in a.field]
    if a.form == "urlencoded":
        data = urllib.parse.urlencode(fields).encode("ascii")
        headers.append("Content-Type: application/x-www-form-urlencoded")
    elif a.form == "multipart":
        from urllib3.filepost import encode_multipart_formdata

        data, ctype = encode_multipart_formdata(fields)
        headers.append(f"Content-Type: {ctype}")
    status, h, body = http(a.method, a.url, headers, data)
    print(json.dumps({"status": status, "headers": h, "body": body.decode("utf-8", "replace")}))


def cmd_metrics(a):
    from prometheus_client.parser import text_string_to_metric_families

    status, h, body = http("GET", a.url, a.header)
    if status != 200:
        print(f"status {status}: {body[:500]!r}", file=sys.stderr)
        return 1
    families = {}
    for fam in text_string_to_metric_families(body.decode("utf-8")):
        families[fam.name] = {
            "type": fam.type,
            "samples": [[s.name, s.labels, s.value] for s in fam.samples],
        }
    print(json.dumps({"content_type": h.get("content-type"), "families": families}))
    return 0


def cmd_browse(a):
    from selenium import webdriver
    from selenium.webdriver.chrome.service import Service
    from selenium.webdriver.common.by import By

    os.makedirs(a.out, exist_ok=True)
    opts = webdriver.ChromeOptions()
    opts.binary_location = a.chromium
    for arg in ["--headless=new", "--no-sandbox", "--disable-gpu", "--window-size=1280,900",
                "--disable-dev-shm-usage", "--no-first-run", "--disable-extensions"]:
        opts.add_argument(arg)
    opts.set_capability("goog:loggingPrefs", {"browser": "ALL"})
    driver = webdriver.Chrome(service=Service(a.chromedriver), options=opts)
    out = {}
    try:
        def shot(name, width):
            # A full-page screenshot at the given width: size the window to
            # the document's height first.
            driver.set_window_size(width, 900)
            h = driver.execute_script("return document.documentElement.scrollHeight")
            driver.set_window_size(width, min(max(h, 600), 8000))
            path = os.path.join(a.out, name)
            driver.save_screenshot(path)
            return path

        def facts():
            return driver.execute_script(
                """
                const q = s => document.querySelectorAll(s).length;
                return {
                  title: document.title,
                  markers: q('svg[data-map] [data-marker="site"]'),
                  marker_links: q('svg[data-map] a[aria-label] [data-marker="site"]'),
                  notices: q('ol[data-list="notices"] > li[data-notice]'),
                  charts: q('svg[data-chart="nights"]'),
                  chart_series: q('svg[data-chart="nights"] g[data-series]'),
                  unlabelled_svgs: Array.from(document.querySelectorAll('svg[role="img"]'))
                     .filter(s => !(s.getAttribute('aria-labelledby') || '').split(' ')
                        .every(id => id && document.getElementById(id))).length,
                  resources: performance.getEntriesByType('resource').map(r => r.name),
                  scroll_width: document.documentElement.scrollWidth,
                  inner_width: window.innerWidth,
                  lang: document.documentElement.lang,
                };
                """
            )

        base = a.base.rstrip("/")
        driver.get(base + "/")
        out["overview"] = facts()
        out["overview"]["screenshot"] = shot("overview.png", 1280)
        driver.get(base + "/sites/" + urllib.parse.quote(a.site, safe=""))
        out["site"] = facts()
        out["site"]["screenshot"] = shot("site.png", 1280)
        # Phone width (a 390 CSS px wide phone): nothing wider than the screen.
        driver.set_window_size(390, 844)
        driver.get(base + "/")
        out["phone"] = facts()
        out["phone"]["screenshot"] = shot("overview-phone.png", 390)
        out["console"] = [
            e.get("message", "") for e in driver.get_log("browser") if e.get("level") in ("SEVERE", "WARNING")
        ]
    finally:
        driver.quit()
    print(json.dumps(out))
    return 0


def main():
    ap = argparse.ArgumentParser()
    sub = ap.add_subparsers(dest="cmd", required=True)
    r = sub.add_parser("request")
    r.add_argument("method")
    r.add_argument("url")
    r.add_argument("--header", action="append", default=[])
    r.add_argument("--form", choices=["urlencoded", "multipart"])
    r.add_argument("--field", action="append", default=[])
    m = sub.add_parser("metrics")
    m.add_argument("url")
    m.add_argument("--header", action="append", default=[])
    b = sub.add_parser("browse")
    b.add_argument("--base", required=True)
    b.add_argument("--site", required=True)
    b.add_argument("--out", required=True)
    b.add_argument("--chromium", default="/usr/bin/chromium")
    b.add_argument("--chromedriver", default="/usr/bin/chromedriver")
    a = ap.parse_args()
    if a.cmd == "request":
        cmd_request(a)
        return 0
    if a.cmd == "metrics":
        return cmd_metrics(a)
    return cmd_browse(a)


if __name__ == "__main__":
    sys.exit(main())
