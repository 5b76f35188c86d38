"""Names the dead-code check (vulture, in ``make lint``) must not report: parameters a
base class or a library's callback signature requires and our code does not use."""

format  # http.server.BaseHTTPRequestHandler.log_message(self, format, *args)
mechanism  # aiosmtpd authenticator(server, session, envelope, mechanism, auth_data)
attrs  # html.parser.HTMLParser.handle_starttag(self, tag, attrs)
