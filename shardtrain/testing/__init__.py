"""Test-only code (fault injection), reached only through `shardtrain.hooks`; the
package never imports it.
"""
