"""qtally.policy"""
