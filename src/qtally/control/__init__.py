"""qtally.control"""
