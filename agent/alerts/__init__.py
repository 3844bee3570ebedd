"""Alerts: rules over the recorder store, queued with what raised them, delivered per channel."""
