"""Layer 3: what happens around one monitoring run.

``rules``     conditions of a run → alerts (persistence, false-discovery control,
              suppression, acknowledgement and snooze), pure and serialisable.
``policy``    the default alert policy and the nightly sequential watch that turns
              forecast-error scores into conditions.
``delivery``  the outbox: messages built from a run's alert events, sent to each
              target at least once, with retries and backoff.

An alert is statistical evidence, not proof: people who know the data decide.
"""
