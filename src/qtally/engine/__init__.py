"""qtally.engine"""
