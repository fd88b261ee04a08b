"""Owner notifications: signed webhooks queued in a transactional outbox and delivered by a
background worker with retries (see :mod:`service.notify.worker`)."""
