"""Plant config loading: every shipped file loads; every bad case gives its one-line error."""

from __future__ import annotations

import copy
import re
from pathlib import Path

import numpy as np
import pytest

from twin import kinds
from twin.config import ConfigError, json_schema, load_config, pointer_keys, validate_config

CONFIGS = sorted((Path(__file__).resolve().parent.parent / "configs").glob("*.toml"))

# A small closed cycle: boiler -> turbine -> condenser -> pump -> boiler.
BASE = {
    "unit": {"id": "tiny-1", "barometric_pressure": "100 kPa"},
    "streams": [
        {"id": "ms", "design": {"pressure": "10 MPa", "temperature": "500 degC"}, "held": ["temperature"]},
        {"id": "ex", "design": {"pressure": "8 kPa"}},
        {"id": "cond"},
        {"id": "fw"},
    ],
    "equipment": [
        {"id": "boiler", "kind": "boiler", "ports": {"feedwater": "fw", "steam": "ms"}},
        {"id": "t1", "kind": "turbine_group", "ports": {"inlet": "ms", "outlet": "ex"},
         "params": {"section": "HP", "efficiency": "85 %"}},
        {"id": "condenser", "kind": "condenser", "ports": {"exhaust": "ex", "outlet": "cond"},
         "params": {"area": "1000 m2", "cooling_water_inlet_temperature": "20 degC",
                    "cooling_water_rise": "9 K"}},
        {"id": "pump", "kind": "pump", "ports": {"inlet": "cond", "outlet": "fw"},
         "params": {"efficiency": 0.8, "discharge_pressure": "12 MPa"}},
        {"id": "gen", "kind": "generator", "params": {"turbines": ["t1"], "rated_power": "100 MW"}},
    ],
    "sensors": [
        {"tag": "MS-P", "topic": "p/ms/p", "quantity": "pressure", "stream": "ms", "unit": "bar(g)",
         "uncertainty": {"value": 0.25, "kind": "percent_of_span"}, "span": [0, 160], "range": [0, 160]},
        {"tag": "MS-T", "topic": "p/ms/t", "quantity": "temperature", "stream": "ms", "unit": "degC",
         "uncertainty": {"value": 1.96}},
        {"tag": "FW-F", "topic": "p/fw/f", "quantity": "mass_flow", "stream": "fw", "unit": "t/h",
         "uncertainty": {"value": 1.0, "kind": "percent_of_reading"}},
        {"tag": "GEN", "topic": "p/gen", "quantity": "power", "equipment": "gen", "unit": "MW",
         "uncertainty": {"value": 0.3, "kind": "percent_of_reading"}, "payload": {"value": "mw"}},
    ],
}

LINE = re.compile(r"^\S+: [^:]+: .+; expected .+$")


def base() -> dict:
    return copy.deepcopy(BASE)


def problems(data: dict) -> list[str]:
    with pytest.raises(ConfigError) as info:
        validate_config(data, source="plant.toml")
    lines = info.value.problems
    assert str(info.value) == "\n".join(lines)
    for line in lines:
        assert LINE.match(line), line  # one line per problem: <file>: <key.path>: <what>; expected <what>
    return lines


def one(data: dict) -> str:
    lines = problems(data)
    assert len(lines) == 1, lines
    return lines[0]


# ------------------------------------------------------------------ good files ---
@pytest.mark.parametrize("path", CONFIGS, ids=lambda p: p.name)
def test_every_shipped_config_loads(path):
    cfg = load_config(path)
    assert cfg.source_path == path
    assert cfg.streams and cfg.equipment


def test_demo_values_in_si_and_defaults_filled():
    cfg = load_config(CONFIGS[0].parent / "demo-u1.toml")
    eq = cfg.equipment_by_id
    assert eq["fwh7"].params == {"ttd": -1.7, "dca": 5.6, "tube_pressure_drop": 0.2e6}
    assert eq["condenser"].params["cooling_water_inlet_temperature"] == pytest.approx(293.15)
    assert eq["crossover_pipe"].params["pressure_drop"] == 0.0  # default from kinds
    assert eq["exhaust_loss"].params["reference_velocity"] == 120.0
    assert eq["generator"].params["rated_power"] == 375e6
    assert eq["hp_exhaust_split"].ports == {"inlet": "hp_exhaust", "outlets": ["cold_reheat", "ext7"]}
    assert cfg.streams_by_id["main_steam"].design == {
        "mass_flow": 295.0, "pressure": 16.2e6, "temperature": pytest.approx(814.15)}
    assert cfg.performance.auxiliary_fixed == 6e6
    assert 90 <= len(cfg.sensors) <= 110
    assert cfg.unit.barometric_tag == "AMB-PB1"
    assert cfg.monitoring.min_load == pytest.approx(0.40)
    assert cfg.monitoring.steady_hold == 10.0
    assert cfg.monitoring.steady_lambdas == (0.3, 0.3, 0.3)
    ms = cfg.sensors_by_tag["HP-MS-P2"]
    assert ms.gauge and ms.conversion.to_si(161.0) == pytest.approx(161e5 + 101325.0)


def test_sensor_conversion_and_sigma():
    cfg = validate_config(base())
    s = cfg.sensors_by_tag
    # VDI 2048: sigma = U/1.96 for a 95 % interval; U = 1.96 K absolute -> sigma = 1 K
    assert s["MS-T"].sigma_si(800.0) == pytest.approx(1.0)
    # 0.25 % of a 160 bar span = 0.4 bar = 40 kPa -> sigma = 40e3/1.96 Pa
    assert s["MS-P"].sigma_si(10e6) == pytest.approx(40e3 / 1.96)
    assert s["MS-P"].gauge and s["MS-P"].conversion.offset == 100e3
    assert s["MS-P"].range_si == (100e3, 160e5 + 100e3)
    # 1 % of reading: 360 t/h = 100 kg/s -> U = 1 kg/s
    assert s["FW-F"].sigma_si(100.0) == pytest.approx(1.0 / 1.96)
    # ... of readings given as an array: 180 and 720 t/h = 50 and 200 kg/s -> U = 0.5, 2 kg/s
    np.testing.assert_allclose(s["FW-F"].sigma_si(np.array([50.0, 200.0])), np.array([0.5, 2.0]) / 1.96)
    assert s["GEN"].payload.value == "/mw"
    # a percent of a gauge reading is a percent of the gauge value: 1 % of 10 bar(g) (1.1 MPa
    # absolute with the 100 kPa barometric offset) = 0.1 bar = 10 kPa
    data = base()
    data["sensors"][0]["uncertainty"] = {"value": 1.0, "kind": "percent_of_reading"}
    gauge = validate_config(data).sensors_by_tag["MS-P"]
    assert gauge.sigma_si(11e5) == pytest.approx(10e3 / 1.96)
    assert s["GEN"].max_age == 30.0


def test_defaults():
    cfg = validate_config(base())
    assert cfg.source_path is None
    assert cfg.unit.name == "tiny-1"
    b = cfg.broker
    assert (b.host, b.port, b.protocol, b.qos) == ("127.0.0.1", 1883, "3.1.1", 1)
    assert b.client_id == "twin-tiny-1"
    assert b.republish_prefix == "twin/tiny-1" and b.events_topic == "twin/tiny-1/events"
    assert (cfg.metrics.address, cfg.metrics.port) == ("127.0.0.1", 9108)
    m = cfg.monitoring
    assert m.cycle == 10.0 and m.window == 10.0
    assert m.steady_lambdas == (0.2, 0.1, 0.1)  # Cao & Rhinehart (1995)
    assert (m.steady_critical_r, m.steady_exit_r, m.steady_warmup) == (2.0, 3.0, 5)
    assert (m.steady_frozen_fraction, m.steady_frozen_windows) == (0.01, 3)
    assert (m.exhaust_moisture_warn, m.exhaust_moisture_alarm) == (0.10, 0.12)  # common practice
    assert cfg.equipment_by_id["pump"].params["drive_efficiency"] == 1.0
    assert cfg.equipment_by_id["pump"].params["discharge_reference"] == ""


def test_sensor_defaults_merge_key_by_key_and_tls_port():
    data = base()
    data["sensor_defaults"] = {"payload": {"timestamp_format": "epoch_ms"}, "max_age": "1 min"}
    data["broker"] = {"tls": {"ca_file": "ca.pem"}, "protocol": 5}
    cfg = validate_config(data)
    gen = cfg.sensors_by_tag["GEN"]
    assert gen.payload.value == "/mw" and gen.payload.timestamp_format == "epoch_ms"
    assert gen.max_age == 60.0
    assert cfg.broker.port == 8883 and cfg.broker.protocol == "5"


def test_pointer_keys_rfc6901():
    # RFC 6901 section 4: "~1" is "/" and "~0" is "~"
    assert pointer_keys("/a~1b/m~0n") == ("a/b", "m~n")
    assert pointer_keys("") == ()


def test_json_schema_describes_the_file():
    schema = json_schema()
    assert set(schema["properties"]) >= {"unit", "streams", "equipment", "sensors", "broker"}
    assert set(schema["required"]) == {"unit", "streams", "equipment"}
    assert "source_path" not in schema["properties"]


# ------------------------------------------------------------------- bad files ---
def test_toml_syntax_error_has_line_and_column(tmp_path):
    path = tmp_path / "bad.toml"
    path.write_text('[unit]\nid = "x"\nname = "unterminated\n', encoding="utf-8")
    with pytest.raises(ConfigError, match=rf"^{re.escape(str(path))}:3:\d+: TOML syntax error: .+; expected valid TOML$"):
        load_config(path)


def test_missing_file():
    with pytest.raises(FileNotFoundError):
        load_config("/nonexistent/plant.toml")


def test_unknown_stream_in_port():
    data = base()
    data["equipment"][1]["ports"]["outlet"] = "exx"
    lines = problems(data)
    assert "plant.toml: equipment[t1].ports.outlet: unknown stream 'exx'; expected a declared stream id" in lines
    assert any("streams[ex]: dangling stream: no outlet port produces it" in x for x in lines)


def test_duplicate_stream_and_equipment_ids():
    data = base()
    data["streams"].append({"id": "fw"})
    with pytest.raises(ConfigError, match=r"streams\[fw\]\.id: duplicate id 'fw'; expected each id once"):
        validate_config(data)
    data = base()
    data["equipment"].append(copy.deepcopy(data["equipment"][4]))
    with pytest.raises(ConfigError, match=r"equipment\[gen\]\.id: duplicate id 'gen'"):
        validate_config(data)


def test_duplicate_sensor_tag():
    data = base()
    data["sensors"].append(dict(data["sensors"][1], topic="p/other"))
    assert "sensors[MS-T].tag: duplicate tag 'MS-T'" in one(data)


def test_duplicate_topic_and_payload_location():
    data = base()
    data["sensors"][1]["topic"] = "p/ms/p"  # both JSON with value at /v
    assert re.search(r"sensors\[MS-T\]\.topic: 'p/ms/p' /v is already mapped to 'MS-P'", one(data))
    data["sensors"][1]["payload"] = {"value": "/t"}  # same topic, another field: fine
    validate_config(data)


def test_unknown_unit():
    data = base()
    data["sensors"][2]["unit"] = "gal/min"
    assert re.search(r"sensors\[FW-F\]\.unit: unit 'gal/min' is an unknown unit; expected one of kg/s", one(data))
    data = base()
    data["equipment"][2]["params"]["area"] = "1000 acres"
    assert "equipment[condenser].params.area: unit 'acres' is an unknown unit; expected one of m2 for area" in one(data)


def test_unknown_kind_lists_valid_kinds():
    data = base()
    data["equipment"][0]["kind"] = "furnace"
    lines = problems(data)
    assert f"equipment[boiler].kind: unknown equipment kind 'furnace'; expected one of {', '.join(kinds.KINDS)}" in lines[0]


def test_dangling_streams():
    data = base()
    data["streams"].append({"id": "spare"})
    lines = problems(data)
    assert lines == [
        "plant.toml: streams[spare]: dangling stream: no outlet port produces it; expected exactly one producer",
        "plant.toml: streams[spare]: dangling stream: no inlet port consumes it; expected exactly one consumer",
    ]
    data = base()
    data["equipment"].append({"id": "src", "kind": "source", "ports": {"outlet": "fw"}})
    assert "streams[fw]: produced by 2 outlet ports (pump.outlet, src.outlet); expected exactly one" in one(data)


def test_missing_required_parameter_and_port():
    data = base()
    del data["equipment"][1]["params"]["efficiency"]
    assert re.search(r"equipment\[t1\]\.params: missing required parameter 'efficiency' of kind "
                     r"turbine_group; expected a ratio value", one(data))
    data = base()
    del data["equipment"][1]["ports"]["inlet"]
    lines = problems(data)
    assert any("equipment[t1].ports: missing port 'inlet' of kind turbine_group; expected a stream id" in x for x in lines)


def test_unknown_parameter_and_port():
    data = base()
    data["equipment"][1]["params"]["eficiency"] = 0.9
    assert "equipment[t1].params.eficiency: unknown parameter for kind turbine_group; expected one of section, efficiency, baumann_factor" in one(data)
    data = base()
    data["equipment"][1]["ports"]["extraction"] = "fw"
    assert "equipment[t1].ports.extraction: unknown port for kind turbine_group; expected one of inlet, outlet" in problems(data)[0]


@pytest.mark.parametrize(
    ("mutate", "pattern"),
    [
        (lambda d: d["equipment"][1]["ports"].update(inlet=["ms"]),
         r"equipment\[t1\]\.ports\.inlet: wrong type list \(\['ms'\]\); expected one stream id"),
        (lambda d: d["equipment"][1]["params"].update(section=3),
         r"equipment\[t1\]\.params\.section: wrong type int \(3\); expected a string"),
        (lambda d: d["equipment"][1]["params"].update(efficiency=True),
         r"equipment\[t1\]\.params\.efficiency: wrong type bool \(True\); expected a number or a ratio string"),
        (lambda d: d["metrics"].update(port="http") if "metrics" in d else d.update(metrics={"port": "http"}),
         r"metrics\.port: wrong value 'http'; expected a valid integer"),
        (lambda d: d["unit"].update(barometric_pressure="1 bar(g)"),
         r"unit\.barometric_pressure: gauge unit 'bar\(g\)' needs a barometric pressure"),
        (lambda d: d["streams"][0]["design"].update(pressure="10 degC"),
         r"streams\[ms\]\.design\.pressure: unit 'degC' is a temperature unit, not a pressure unit"),
    ],
)
def test_wrong_types(mutate, pattern):
    data = base()
    mutate(data)
    assert re.search(pattern, one(data))


def test_pump_needs_exactly_one_discharge_spec():
    data = base()
    data["equipment"][3]["params"]["discharge_reference"] = "ms"
    assert "equipment[pump].params: pump needs exactly one of discharge_pressure > 0 or discharge_reference; expected one, got both" in one(data)
    del data["equipment"][3]["params"]["discharge_pressure"]
    validate_config(data)
    data["equipment"][3]["params"]["discharge_reference"] = "nowhere"
    assert "equipment[pump].params.discharge_reference: unknown stream 'nowhere'; expected a stream id" in one(data)
    del data["equipment"][3]["params"]["discharge_reference"]
    assert "got neither" in one(data)


def test_generator_turbines_must_be_turbine_elements():
    data = base()
    data["equipment"][4]["params"]["turbines"] = ["t1", "pump"]
    assert "equipment[gen].params.turbines: 'pump' is not turbine_group or exhaust_loss equipment" in one(data)


def test_sensor_targets():
    data = base()
    data["sensors"][1]["stream"] = "nope"
    assert "sensors[MS-T].stream: unknown stream 'nope'; expected a stream id" in one(data)
    data = base()
    data["sensors"][3] = dict(data["sensors"][3], equipment=None, stream="ms")
    assert "sensors[GEN]: power is measured on a equipment; expected exactly one key 'equipment' (got stream)" in one(data)
    data = base()
    data["sensors"][3]["equipment"] = "condenser"
    assert "sensors[GEN].equipment: power cannot be measured on condenser 'condenser'; expected equipment of kind generator or pump" in one(data)
    data = base()
    data["sensors"][1]["unit"] = "MW"
    assert "sensors[MS-T].unit: unit 'MW' is a power unit, not a temperature unit" in one(data)
    data = base()
    data["sensors"][1]["quantity"] = "humidity"
    assert re.search(r"sensors\[MS-T\]\.quantity: wrong value 'humidity'; expected 'mass_flow', 'pressure'", one(data))


def test_barometric_sensor_and_tag():
    data = base()
    del data["unit"]["barometric_pressure"]
    lines = problems(data)  # the gauge sensor has no barometric pressure now
    assert any("sensors[MS-P].unit: gauge unit 'bar(g)' needs a barometric pressure" in x for x in lines)
    data["unit"]["barometric_tag"] = "BARO"
    data["sensors"].append({"tag": "BARO", "topic": "p/baro", "quantity": "barometric_pressure",
                            "unit": "mbar", "uncertainty": {"value": 0.5}, "payload": {"format": "number"}})
    cfg = validate_config(data)
    assert cfg.unit.barometric_pressure == 101325.0  # standard atmosphere (ISO 2533) as fallback
    data["unit"]["barometric_tag"] = "MS-T"
    assert "unit.barometric_tag: 'MS-T' is not a barometric_pressure sensor" in one(data)


def test_gauge_flag():
    data = base()
    data["sensors"][0].update(unit="bar", gauge=True)
    assert validate_config(data).sensors_by_tag["MS-P"].conversion.offset == 100e3
    data["sensors"][0].update(unit="bar(g)", gauge=False)
    assert "sensors[MS-P].unit: gauge = false contradicts unit 'bar(g)'" in one(data)


def test_percent_of_span_needs_span():
    data = base()
    del data["sensors"][0]["span"]
    assert "sensors[MS-P].span: missing; expected [low, high] for a percent_of_span uncertainty" in one(data)


def test_held_must_be_design_key():
    data = base()
    data["streams"][1]["held"] = ["temperature"]
    assert "streams[ex].held: 'temperature' has no design value; expected one of the design keys (pressure)" in one(data)
    data = base()
    data["streams"][1]["design"]["enthalpy"] = 1.0
    assert "streams[ex].design.enthalpy: unknown design quantity; expected one of mass_flow" in one(data)


def test_literal_password_is_refused():
    data = base()
    data["broker"] = {"username": "twin", "password": "hunter2"}
    line = one(data)
    assert line == ("plant.toml: broker.password: a literal password is not allowed in the config file; "
                    "expected password_file (a file holding the password) or password_env "
                    "(an environment variable name)")
    assert "hunter2" not in line


def test_password_sources(tmp_path):
    data = base()
    data["broker"] = {"username": "twin", "password_file": "pw", "password_env": "X"}
    assert "broker: both password_file and password_env given; expected at most one" in one(data)
    data["broker"] = {"password_env": "TWIN_PW"}
    assert "broker.username: missing while a password is configured" in one(data)
    data["broker"] = {"username": "twin", "password_env": "TWIN_PW"}
    assert validate_config(data).broker.password({"TWIN_PW": "s3"}) == "s3"


def test_password_file_is_relative_to_config(tmp_path):
    demo = (CONFIGS[0].parent / "demo-u1.toml").read_text(encoding="utf-8")
    demo = demo.replace('republish_prefix = "twin/demo-u1"',
                        'username = "twin"\npassword_file = "secret.txt"\nrepublish_prefix = "twin/demo-u1"')
    (tmp_path / "plant.toml").write_text(demo, encoding="utf-8")
    (tmp_path / "secret.txt").write_text("pa55\n", encoding="utf-8")
    cfg = load_config(tmp_path / "plant.toml")
    assert cfg.broker.password({}) == "pa55"


def test_unknown_keys_list_the_valid_ones():
    data = base()
    data["metrics"] = {"adress": "0.0.0.0"}
    assert one(data) == "plant.toml: metrics.adress: unknown key; expected one of address, port, tls"
    data = base()
    data["monitor"] = {}
    assert "plant.toml: monitor: unknown key; expected one of unit, streams, equipment" in one(data)


def test_missing_required_sections_and_many_problems():
    lines = problems({"unit": {"id": "Bad Id"}})
    assert "plant.toml: streams: required key is missing; expected a value" in lines
    assert "plant.toml: equipment: required key is missing; expected a value" in lines
    assert any(x.startswith("plant.toml: unit.id: invalid id 'Bad Id'") for x in lines)
    assert len(lines) == 3


def test_performance_and_sections():
    data = base()
    data["performance"] = {"load_stream": "mss", "throttle_valve": "t1",
                           "boiler_efficiency": [[1.0, 0.88], [0.5, 0.86]]}
    data["sections"] = [{"id": "HP", "inlet": "ms", "outlet": "exx"}]
    lines = problems(data)
    assert [x.split(": ")[1] for x in lines] == [
        "performance.load_stream", "performance.throttle_valve",
        "performance.boiler_efficiency[1]", "sections[HP].outlet"]
    data["performance"] = {"load_stream": "ms"}  # no design mass_flow on ms
    data["sections"] = []
    assert "performance.load_stream: stream 'ms' has no design mass_flow" in one(data)


def test_monitoring_checks():
    data = base()
    data["monitoring"] = {"steady_signals": ["MS-T", "XX"], "exhaust_moisture_warn": "13 %",
                          "steady_lambdas": [0.2, 0.1, 1.5], "window": "1 min"}
    lines = problems(data)
    assert "plant.toml: monitoring.steady_signals: unknown sensor tag 'XX'; expected a configured sensor tag" in lines
    assert any(x.startswith("plant.toml: monitoring.steady_lambdas:") for x in lines)
    assert any(x.startswith("plant.toml: monitoring.exhaust_moisture_alarm: warn and alarm") for x in lines)
    data["monitoring"] = {"steady_critical_r": 2.5, "steady_exit_r": 2.0}
    assert one(data) == "plant.toml: monitoring.steady_exit_r: 2.0; expected at least steady_critical_r (2.5)"
    data["monitoring"] = {"window": "1 min", "drift": {"ewma_lambda": 0}}
    assert re.search(r"monitoring\.drift\.ewma_lambda: wrong value 0; expected greater than 0", one(data))
