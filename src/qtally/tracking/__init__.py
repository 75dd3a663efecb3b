"""qtally.tracking"""
