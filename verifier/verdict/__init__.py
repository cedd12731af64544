"""The verdict stage: findings, judged by the policy, become pass, warn, block or error."""
