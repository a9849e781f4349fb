"""Notifications of alarm transitions: rules choose which transitions go where
(monitor/notify/rules.py); a webhook (signed JSON, monitor/notify/webhook.py) and e-mail
(monitor/notify/mail.py) deliver them from their own bounded queues and threads
(monitor/notify/dispatch.py), so a target that fails never holds up the service."""
