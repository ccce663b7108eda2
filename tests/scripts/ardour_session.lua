-- Build an Ardour session holding the Breakdown VST3 on a mono track, for tests/tests/ardour_host.rs.
-- Run by Ardour's headless Lua tool (`ardour7-lua`) after a preamble that defines the table CONFIG:
--   CONFIG = { dir = "...", name = "...", rate = 48000, block = 1024, plugin = "Breakdown",
--              params = { { "Gain", 0.6 }, ... } }   -- parameter label, value in Ardour's terms
-- (plugin = nil: the track without the plugin).
-- The session gets one mono audio track "DI" (strict I/O) whose two outputs feed the master bus's two inputs,
-- the track's and the master bus's panners bypassed, and the plugin as the track's first processor with the given
-- parameters. The test adds the region (the DI file) and the session range to the saved XML itself: Ardour
-- 7.3's Lua bindings have no file import outside the editor.
-- Prints, one per line:
--   set <label> <value>                                                                (each assignment)
--   param <index> <label> lower=<l> upper=<u> steps=<integer_step> value=<v>   (every input control, after)
--   latency=<samples the plugin reports>
--   saved
-- and exits with an error (a Lua error message) when a step fails.

local c = CONFIG

local function fail(msg)
	print("FAILED: " .. msg)
	error(msg)
end

local be = AudioEngine:set_backend("None (Dummy)", "", "")
if be:isnil() then fail("no dummy audio backend") end
AudioEngine:set_sample_rate(c.rate)
AudioEngine:set_buffer_size(c.block)
if AudioEngine:start(false) ~= 0 then fail("the audio engine did not start") end

local s = create_session(c.dir, c.name, c.rate)
if not s then fail("create_session failed") end

local tl = Session:new_audio_track(1, 1, nil, 1, "DI", ARDOUR.PresentationInfo.max_order, ARDOUR.TrackMode.Normal, true)
if tl:size() ~= 1 then fail("new_audio_track made " .. tl:size() .. " tracks") end
local t = tl:front()
-- Strict I/O: the track stays mono through the (stereo) plugin, whose first output alone feeds the track.
t:set_strict_io(true)
-- A strict-I/O track gets as many outputs as the master bus has inputs (two) and a mono-to-stereo panner (equal
-- power: -3 dB in the middle). With the panner bypassed the track copies its one channel to both outputs
-- unchanged. The master bus is stereo too; with its panner bypassed it passes input n to output n unchanged.
t:panner_shell():set_bypassed(true)
Session:master_out():panner_shell():set_bypassed(true)
if t:n_outputs():n_audio() ~= 2 then fail("the track has " .. t:n_outputs():n_audio() .. " outputs, not 2") end

-- Track output n to master input n, and nothing else (Ardour's own auto-connection runs on another thread, so
-- this is redone after the engine has run; see the end).
local function connect()
	t:input():disconnect_all(nil)
	t:output():disconnect_all(nil)
	for n = 0, 1 do
		if t:output():audio(n):connect("Master/audio_in " .. (n + 1)) ~= 0 then
			fail("cannot connect the track to the master bus")
		end
	end
end
connect()

local latency = 0
if c.plugin then
	local p = ARDOUR.LuaAPI.new_plugin(Session, c.plugin, ARDOUR.PluginType.VST3, "")
	if p:isnil() then fail("Ardour found no VST3 plugin named " .. c.plugin) end
	if t:add_processor_by_index(p, 0, nil, true) ~= 0 then fail("cannot add the plugin to the track") end
	local plug = p:to_insert():plugin(0)

	for _, kv in ipairs(c.params) do
		local label, value = kv[1], kv[2]
		local found = false
		for i = 0, plug:parameter_count() - 1 do
			if plug:parameter_label(i) == label then
				if not ARDOUR.LuaAPI.set_processor_param(p, i, value) then
					fail("set_processor_param refused " .. label .. " = " .. value)
				end
				print(string.format("set %s %.9g", label, value))
				found = true
				break
			end
		end
		if not found then fail("the plugin has no parameter labelled " .. label) end
	end

	-- Ardour hands a parameter change to the plugin's processor in the next process cycle, and the plugin's
	-- saved state (which a reloaded session restores) is read from the processor: let a few cycles run first.
	if not ARDOUR.LuaAPI.wait_for_process_callback(8, 5000) then fail("the engine ran no process cycle") end

	for i = 0, plug:parameter_count() - 1 do
		if plug:parameter_is_input(i) and plug:parameter_is_control(i) then
			local _, d = plug:get_parameter_descriptor(i, ARDOUR.ParameterDescriptor())
			local desc = d[2]
			print(string.format("param %d %s lower=%.9g upper=%.9g steps=%s value=%.9g", i, plug:parameter_label(i),
				desc.lower, desc.upper, tostring(desc.integer_step), ARDOUR.LuaAPI.get_processor_param(p, i)))
		end
	end
	latency = p:signal_latency()
else
	if not ARDOUR.LuaAPI.wait_for_process_callback(8, 5000) then fail("the engine ran no process cycle") end
end
connect()
print("latency=" .. latency)

Session:save_state("", false, false, false, false, false)
print("saved")
close_session()
