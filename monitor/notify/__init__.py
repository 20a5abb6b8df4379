"""Telling people: HTML pages, charts, the digest, and e-mail through the outbox (layer 5).

``mail`` builds MIME messages, queues them in the database's outbox and delivers them over SMTP;
see its module docstring for what a pass and the digest command call.
"""
