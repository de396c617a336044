"""What people and scripts read: alert listings, the HTML report, and webhook delivery from the
outbox."""
