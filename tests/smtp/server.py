#!/usr/bin/env python3
"""A real SMTP server for glint's email tests (aiosmtpd on 127.0.0.1).

Every message it accepts is stored whole (`NNN.eml`) and, decoded with Python's email package, as
`NNN.json` (envelope recipients, subject, Message-ID, plain and HTML parts, attachments saved beside it), so
the tests can check what a person would receive. Recipients named with --reject get
`550 5.1.1` at RCPT TO. With --tls-ca-out FILE it makes a test CA and a certificate for "localhost" (trustme),
writes the CA to FILE and requires STARTTLS (or, with --implicit-tls, speaks TLS from the first byte); with
--auth USER:PASSWORD it requires AUTH. It prints `ready PORT` on stdout once listening and runs until
SIGTERM/SIGINT.
Usage: server.py --port PORT --dir DIR [--reject ADDR ...] [--tls-ca-out PEM [--implicit-tls]]
                 [--auth USER:PASSWORD]
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
import time

from aiosmtpd.smtp import SMTP, AuthResult, LoginPassword


class Store:
    def __init__(self, out_dir, reject):
        self.out_dir = out_dir
        self.reject = {a.lower() for a in reject}
        self.count = 0

    async def handle_RCPT(self, server, session, envelope, address, rcpt_options):
        if address.lower() in self.reject:
            return "550 5.1.1 <%s>: mailbox unavailable (rejected by the test server)" % address
        envelope.rcpt_tos.append(address)
        return "250 OK"

    async def handle_DATA(self, server, session, envelope):
        self.count += 1
        # Nanoseconds first, so names sort in the order messages were accepted, across restarts too.
        stem = os.path.join(self.out_dir, "%020d-%06d" % (time.time_ns(), self.count))
        raw = envelope.original_content or envelope.content
        if isinstance(raw, str):
            raw = raw.encode()
        msg = email.message_from_bytes(raw, policy=email.policy.default)
        summary = {
            "envelope_to": list(envelope.rcpt_tos),
            "mail_from": envelope.mail_from,
            "subject": str(msg.get("Subject", "")),
            "message_id": str(msg.get("Message-ID", "")),
            "to": str(msg.get("To", "")),
            "text": None,
            "html": None,
            "attachments": [],
        }
        n = 0
        for part in msg.walk():
            if part.is_multipart():
                continue
            ctype = part.get_content_type()
            if part.get_filename():
                n += 1
                path = "%s-att%d-%s" % (stem, n, os.path.basename(part.get_filename()))
                with open(path, "wb") as f:
                    f.write(part.get_payload(decode=True))
                summary["attachments"].append(
                    {"filename": part.get_filename(), "content_type": ctype, "path": path}
                )
            elif ctype == "text/plain" and summary["text"] is None:
                summary["text"] = part.get_content()
            elif ctype == "text/html" and summary["html"] is None:
                summary["html"] = part.get_content()
        with open(stem + ".eml", "wb") as f:
            f.write(raw)
        # The JSON last and by rename: a test that sees it sees a whole message.
        with open(stem + ".json.tmp", "w") as f:
            json.dump(summary, f)
        os.rename(stem + ".json.tmp", stem + ".json")
        return "250 Message accepted for delivery"


async def main():
    ap = argparse.ArgumentParser()
    ap.add_argument("--port", type=int, required=True)
    ap.add_argument("--dir", required=True)
    ap.add_argument("--reject", action="append", default=[])
    ap.add_argument("--tls-ca-out")
    ap.add_argument("--implicit-tls", action="store_true")
    ap.add_argument("--auth")
    args = ap.parse_args()
    os.makedirs(args.dir, exist_ok=True)
    handler = Store(args.dir, args.reject)
    ctx = None
    if args.tls_ca_out:
        import trustme

        ca = trustme.CA()
        ctx = ssl.create_default_context(ssl.Purpose.CLIENT_AUTH)
        ca.issue_cert("localhost").configure_cert(ctx)
        ca.cert_pem.write_to_path(args.tls_ca_out)
    kwargs = {"hostname": "glint-test-smtp", "decode_data": False}
    if ctx is not None and not args.implicit_tls:
        kwargs.update(tls_context=ctx, require_starttls=True)
    if args.auth:
        user, password = args.auth.split(":", 1)

        def check(server, session, envelope, mechanism, auth_data):
            ok = (
                isinstance(auth_data, LoginPassword)
                and auth_data.login.decode() == user
                and auth_data.password.decode() == password
            )
            return AuthResult(success=ok)

        # Under implicit TLS the whole session is encrypted, but aiosmtpd only knows of STARTTLS: it would
        # never offer AUTH if told to require TLS.
        kwargs.update(
            authenticator=check,
            auth_required=True,
            auth_require_tls=ctx is not None and not args.implicit_tls,
        )
    loop = asyncio.get_running_loop()
    server = await loop.create_server(
        lambda: SMTP(handler, **kwargs),
        host="127.0.0.1",
        port=args.port,
        reuse_address=True,
        ssl=ctx if args.implicit_tls else None,
    )
    stop = asyncio.Event()
    for sig in (signal.SIGTERM, signal.SIGINT):
        loop.add_signal_handler(sig, stop.set)
    port = server.sockets[0].getsockname()[1]
    print("ready %d" % port, flush=True)
    await stop.wait()
    server.close()
    await server.wait_closed()


if __name__ == "__main__":
    try:
        asyncio.run(main())
    except KeyboardInterrupt:
        sys.exit(0)
