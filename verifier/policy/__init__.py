"""The policy stage: the trusted policy, read from the base revision, validated, with waivers."""
