"""The DDS port's graph queries, named and shaped as rclpy's Node offers them.

Expected values follow the conventions rmw_cyclonedds builds its graph from (ros2-interop.md
4.1 and 4.2, from rmw_cyclonedds and rmw_dds_common): ROS topics are the DDS topics `rt/...`
shown without `rt`, types demangled (`std_msgs::msg::dds_::String_` -> `std_msgs/msg/String`),
nodes only from ros_discovery_info, a node's services are the `rq/...Request` readers its record
lists, and a participant that leaves takes its nodes with it. rclpy returns lists of
(name, [types]) and (name, namespace) tuples, sorted by name.
"""
from __future__ import annotations

import random

import pytest

pytest.importorskip('cyclonedds')

from constraint_ctrl.transport.port import open_port  # noqa: E402
from waiting import wait_until  # noqa: E402

pytestmark = pytest.mark.integration




def test_topics_publishers_nodes_and_services(monkeypatch: pytest.MonkeyPatch) -> None:
    monkeypatch.setenv('ROS_DOMAIN_ID', str(random.randint(100, 230)))
    asker = open_port('dds', 'asker', [])
    other = open_port('dds', 'other', ['--ros-args', '-r', '__ns:=/cell1'])
    try:
        t = other.types
        other.create_publisher(t.String, '~/events', 'default')
        other.create_publisher(t.JointState, '/joint_states', 'sensor')
        other.create_publisher(t.JointState, '/joint_states', 'sensor')
        other.create_subscription(t.Float64MultiArray, 'command', lambda m: None, 'default')
        other.create_service(t.Trigger, '~/hold', lambda q, r: r)

        assert wait_until(lambda: asker.count_publishers('/joint_states') == 2, 30.0)
        topics = dict(asker.get_topic_names_and_types())
        assert topics['/cell1/other/events'] == ['std_msgs/msg/String']
        assert topics['/joint_states'] == ['sensor_msgs/msg/JointState']
        assert topics['/cell1/command'] == ['std_msgs/msg/Float64MultiArray']   # a reader
        assert [name for name, _ in asker.get_topic_names_and_types()] == sorted(topics)
        assert not any(name.startswith(('rt/', 'rq/', 'rr/', '/rq', '/rr')) or 'DCPS' in name
                       for name in topics)
        assert asker.count_publishers('/cell1/other/events') == 1
        assert asker.count_publishers('/cell1/command') == 0                  # readers only
        # best effort for sensor data, reliable by default (qos.py profiles)
        assert asker.publisher_qos('/joint_states') == [
            ('sensor_msgs/msg/JointState', False, False)] * 2
        assert asker.publisher_qos('/cell1/other/events') == [('std_msgs/msg/String', True,
                                                                 False)]

        assert wait_until(lambda: ('other', '/cell1') in asker.get_node_names_and_namespaces(),
                          30.0)
        assert ('asker', '/') in asker.get_node_names_and_namespaces()
        services = dict(asker.get_service_names_and_types_by_node('other', '/cell1'))
        assert services['/cell1/other/hold'] == ['std_srvs/srv/Trigger']
        assert services['/cell1/other/set_parameters'] == ['rcl_interfaces/srv/SetParameters']
        assert asker.get_service_names_and_types_by_node('nobody', '/') == []
        # a client is not a server: the asker's client does not make the service its own
        asker.create_client(t.Trigger, '/cell1/other/hold')
        assert '/cell1/other/hold' not in dict(
            asker.get_service_names_and_types_by_node('asker', '/'))
    finally:
        other.shutdown()
    try:
        assert wait_until(lambda: ('other', '/cell1') not in
                          asker.get_node_names_and_namespaces(), 30.0)
        assert wait_until(lambda: asker.count_publishers('/joint_states') == 0, 30.0)
    finally:
        asker.shutdown()
