"""A real SMTP server for the delivery tests (aiosmtpd), and an independent
MIME reader for what it received (Python's email package).

Serve:
  smtp_sink.py serve --port P --dir D [--fail-first N] [--reject-rcpt]
               [--tls-cert C --tls-key K [--implicit-tls]]
               [--auth USER:PASSWORD [--auth-without-tls]]

  Listens on 127.0.0.1:P. Each accepted message is written byte for byte to
  D/NNNN.eml (numbering goes on after the files already in D); each
  transaction (accepted or not) appends one JSON line to
  D/attempts.jsonl: {"stage", "code", "tls", "auth_user", "mail_from",
  "rcpt_tos"}. --fail-first N answers the first N DATA commands with
  "451 4.3.0" (RFC 5321 transient); --reject-rcpt answers every RCPT with
  "550 5.1.1" (permanent). With --tls-cert/--tls-key the server offers
  STARTTLS and refuses MAIL before it ("530"), or with --implicit-tls
  speaks TLS from the first byte (SMTPS); with --auth it offers AUTH
  PLAIN/LOGIN (after STARTTLS only, aiosmtpd's default) and accepts only
  that user (--auth-without-tls: also on a plain connection, for loopback
  tests of a daemon that has no test CA). Prints "ready" on stdout once
  listening; stops on SIGTERM or when stdin closes.

Parse:
  smtp_sink.py parse FILE

  Prints JSON: every header field in order (name, decoded value, raw
  value), the parser's defects, the tree of content types, and each leaf
  part's decoded content. policy=email.policy.default (RFC 5322 + RFC 6532
  aware; RFC 2047 encoded words decoded).
"""

import argparse
import asyncio
import email
import email.policy
import json
import os
import signal
import ssl
import sys
import threading


def serve(args):
    from aiosmtpd.controller import Controller
    from aiosmtpd.smtp import AuthResult, LoginPassword

    os.makedirs(args.dir, exist_ok=True)
    lock = threading.Lock()
    # A restarted sink (same folder) goes on numbering after what is there.
    saved = len([n for n in os.listdir(args.dir) if n.endswith(".eml")])
    state = {"data_seen": 0, "saved": saved}

    def log(server, session, envelope, stage, code):
        # session.ssl is set by STARTTLS; an implicit-TLS transport has an
        # ssl_object from the first byte.
        transport = getattr(server, "transport", None)
        implicit = (
            transport is not None
            and transport.get_extra_info("ssl_object") is not None
        )
        rec = {
            "stage": stage,
            "code": code,
            "tls": session.ssl is not None or implicit,
            "auth_user": (
                session.auth_data.login.decode()
                if getattr(session, "auth_data", None) is not None
                and getattr(session.auth_data, "login", None)
                else None
            ),
            "mail_from": envelope.mail_from,
            "rcpt_tos": list(envelope.rcpt_tos),
        }
        with lock:
            with open(os.path.join(args.dir, "attempts.jsonl"), "a") as f:
                f.write(json.dumps(rec) + "\n")

    class Handler:
        async def handle_RCPT(self, server, session, envelope, address, rcpt_options):
            if args.reject_rcpt:
                log(server, session, envelope, "rcpt", 550)
                return "550 5.1.1 no such mailbox here"
            envelope.rcpt_tos.append(address)
            return "250 OK"

        async def handle_DATA(self, server, session, envelope):
            with lock:
                state["data_seen"] += 1
                n = state["data_seen"]
            if n <= args.fail_first:
                log(server, session, envelope, "data", 451)
                return "451 4.3.0 try again later"
            with lock:
                state["saved"] += 1
                name = "%04d.eml" % state["saved"]
            # original_content: the bytes as sent, before any decoding.
            with open(os.path.join(args.dir, name), "wb") as f:
                f.write(envelope.original_content)
            log(server, session, envelope, "data", 250)
            return "250 OK stored"

    kwargs = {}
    if args.tls_cert:
        ctx = ssl.create_default_context(ssl.Purpose.CLIENT_AUTH)
        ctx.load_cert_chain(args.tls_cert, args.tls_key)
        if args.implicit_tls:
            # SMTPS: TLS from the first byte (RFC 8314 "implicit TLS").
            kwargs["ssl_context"] = ctx
        else:
            kwargs["tls_context"] = ctx
            kwargs["require_starttls"] = True
    if args.auth:
        user, password = args.auth.split(":", 1)

        def authenticator(server, session, envelope, mechanism, auth_data):
            ok = (
                isinstance(auth_data, LoginPassword)
                and auth_data.login.decode() == user
                and auth_data.password.decode() == password
            )
            return AuthResult(success=ok, handled=False, auth_data=auth_data)

        kwargs["authenticator"] = authenticator
        kwargs["auth_required"] = True
        if args.auth_without_tls:
            # Loopback tests only: AUTH offered on a plain connection.
            kwargs["auth_require_tls"] = False

    controller = Controller(
        Handler(),
        hostname="127.0.0.1",
        port=args.port,
        decode_data=False,
        **kwargs,
    )
    controller.start()
    print("ready", flush=True)

    stop = threading.Event()
    signal.signal(signal.SIGTERM, lambda *_: stop.set())

    def watch_stdin():
        sys.stdin.read()
        stop.set()

    threading.Thread(target=watch_stdin, daemon=True).start()
    stop.wait()
    controller.stop()


def walk(part):
    node = {"content_type": part.get_content_type()}
    if part.is_multipart():
        node["parts"] = [walk(p) for p in part.iter_parts()]
    else:
        node["charset"] = part.get_content_charset()
        node["cte"] = part.get("Content-Transfer-Encoding")
        content = part.get_content()
        if isinstance(content, bytes):
            # Binary parts (the digest's chart): their size and Content-ID.
            node["bytes"] = len(content)
            node["content_id"] = part.get("Content-ID")
        else:
            node["content"] = content
    return node


def legacy_addresses(raw):
    """From and To read the older way: email.utils.getaddresses on the raw
    field, then email.header.decode_header on the display name. That path
    drops the white space between adjacent encoded words as RFC 2047 §6.2
    says; policy.default's address parser keeps a space there (measured
    with Python 3.11), which splits a long name that the sender broke into
    two encoded words mid-word."""
    from email.header import decode_header, make_header
    from email.utils import getaddresses

    old = email.message_from_bytes(raw, policy=email.policy.compat32)
    out = {}
    for k in ("from", "to"):
        values = old.get_all(k) or []
        pairs = getaddresses([str(v) for v in values])
        out[k] = [[str(make_header(decode_header(n))), a] for n, a in pairs]
    return out


def parse(path):
    with open(path, "rb") as f:
        raw = f.read()
    msg = email.message_from_bytes(raw, policy=email.policy.default)
    headers = []
    for name, value in msg.items():
        headers.append({"name": name, "value": str(value)})
    # The raw header block as it was on the wire, to look for bare LF and
    # lines over 998 octets (RFC 5322 §2.1.1, §2.3).
    head = raw.split(b"\r\n\r\n", 1)[0]
    out = {
        "headers": headers,
        "defects": [type(d).__name__ for d in msg.defects],
        "part_defects": [
            type(d).__name__ for p in msg.walk() for d in p.defects
        ],
        "tree": walk(msg),
        "raw_header_lines": head.decode("ascii", "replace").split("\r\n"),
        "bare_lf_in_header": b"\n" in head.replace(b"\r\n", b""),
        "non_ascii_in_header": any(b > 127 for b in head),
        "max_line_octets": max(len(l) for l in raw.split(b"\r\n")),
        "addresses": {
            k: [[a.display_name, a.addr_spec] for a in msg[k].addresses]
            for k in ("from", "to")
            if msg[k] is not None
        },
        "date_iso": msg["date"].datetime.isoformat() if msg["date"] else None,
        "addresses_rfc2047": legacy_addresses(raw),
    }
    json.dump(out, sys.stdout)


def main():
    ap = argparse.ArgumentParser()
    sub = ap.add_subparsers(dest="cmd", required=True)
    s = sub.add_parser("serve")
    s.add_argument("--port", type=int, required=True)
    s.add_argument("--dir", required=True)
    s.add_argument("--fail-first", type=int, default=0)
    s.add_argument("--reject-rcpt", action="store_true")
    s.add_argument("--tls-cert")
    s.add_argument("--tls-key")
    s.add_argument("--implicit-tls", action="store_true")
    s.add_argument("--auth")
    s.add_argument("--auth-without-tls", action="store_true")
    p = sub.add_parser("parse")
    p.add_argument("file")
    args = ap.parse_args()
    if args.cmd == "serve":
        serve(args)
    else:
        parse(args.file)


if __name__ == "__main__":
    main()
