"""qtally.evaluate"""
