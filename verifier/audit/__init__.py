"""The weekly audit: what the assistants committed, what the gate verified, what got through."""
