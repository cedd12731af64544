"""The selection stage: which tests can observe the machine-written lines."""
