"""ROS_DOMAIN_ID for the test peers made in this process.

A DDS port joins the domain in ROS_DOMAIN_ID when it is opened (as rclpy's context does at
init); the controller processes get theirs through their environment. Test modules share this
process, so a peer's domain is set only while it is opened and the previous value is put back.
"""
from __future__ import annotations

import os
from collections.abc import Iterator
from contextlib import contextmanager


@contextmanager
def in_domain(domain: str) -> Iterator[str]:
    """ROS_DOMAIN_ID = ``domain`` inside the block; the value before (or none) after it."""
    saved = os.environ.get('ROS_DOMAIN_ID')
    os.environ['ROS_DOMAIN_ID'] = domain
    try:
        yield domain
    finally:
        if saved is None:
            os.environ.pop('ROS_DOMAIN_ID', None)
        else:
            os.environ['ROS_DOMAIN_ID'] = saved
