//! Host-level test of the CLAP plugin (issue 3, "What it must show"): load the built `breakdown.clap` with
//! `libloading` and drive it through `clap-sys` the way a DAW does — entry init, plugin factory, create with a
//! minimal host, init, audio-ports / params / latency / state extensions, activate at 44.1, 48 and 96 kHz with
//! block sizes 1, 64 and 4096, start processing, process — and compare what it plays with the `breakdown-dsp`
//! model rendering the same settings.
//!
//! The outside reference for the calls, structures and their order is the CLAP 1.2 specification
//! (github.com/free-audio/clap, include/clap/*.h: plugin.h for the life cycle "init -> activate ->
//! start_processing -> process", ext/params.h, ext/state.h, ext/latency.h, ext/audio-ports.h).

mod plugin_host;

/// Counts heap allocations made on a thread while it is inside the plugin's `process` (the audio thread in
/// these tests). The real-time rule is that this count stays zero.
struct CountingAllocator;

thread_local! {
    static IN_PLUGIN_PROCESS: std::cell::Cell<bool> = const { std::cell::Cell::new(false) };
    static PROCESS_ALLOCATIONS: std::cell::Cell<usize> = const { std::cell::Cell::new(0) };
}

unsafe impl std::alloc::GlobalAlloc for CountingAllocator {
    unsafe fn alloc(&self, layout: std::alloc::Layout) -> *mut u8 {
        if IN_PLUGIN_PROCESS.try_with(|w| w.get()).unwrap_or(false) {
            let _ = PROCESS_ALLOCATIONS.try_with(|c| c.set(c.get() + 1));
        }
        unsafe { std::alloc::System.alloc(layout) }
    }
    unsafe fn dealloc(&self, ptr: *mut u8, layout: std::alloc::Layout) {
        if IN_PLUGIN_PROCESS.try_with(|w| w.get()).unwrap_or(false) {
            let _ = PROCESS_ALLOCATIONS.try_with(|c| c.set(c.get() + 1));
        }
        unsafe { std::alloc::System.dealloc(ptr, layout) }
    }
    unsafe fn realloc(&self, ptr: *mut u8, layout: std::alloc::Layout, new_size: usize) -> *mut u8 {
        if IN_PLUGIN_PROCESS.try_with(|w| w.get()).unwrap_or(false) {
            let _ = PROCESS_ALLOCATIONS.try_with(|c| c.set(c.get() + 1));
        }
        unsafe { std::alloc::System.realloc(ptr, layout, new_size) }
    }
}

#[global_allocator]
static ALLOCATOR: CountingAllocator = CountingAllocator;

/// Heap allocations (and frees) made on this thread inside the plugin's `process` so far.
fn process_allocations() -> usize {
    PROCESS_ALLOCATIONS.with(|c| c.get())
}

use breakdown_dsp::Quality;
use clap_sys::audio_buffer::clap_audio_buffer;
use clap_sys::entry::clap_plugin_entry;
use clap_sys::events::{
    clap_event_header, clap_event_param_value, clap_input_events, clap_output_events,
    CLAP_CORE_EVENT_SPACE_ID, CLAP_EVENT_PARAM_VALUE,
};
use clap_sys::ext::audio_ports::{
    clap_audio_port_info, clap_plugin_audio_ports, CLAP_EXT_AUDIO_PORTS,
};
use clap_sys::ext::audio_ports_config::{
    clap_audio_ports_config, clap_plugin_audio_ports_config, CLAP_EXT_AUDIO_PORTS_CONFIG,
};
use clap_sys::ext::latency::{clap_host_latency, clap_plugin_latency, CLAP_EXT_LATENCY};
use clap_sys::ext::params::{
    clap_param_info, clap_plugin_params, CLAP_EXT_PARAMS, CLAP_PARAM_IS_STEPPED,
};
use clap_sys::ext::state::{clap_plugin_state, CLAP_EXT_STATE};
use clap_sys::ext::thread_check::{clap_host_thread_check, CLAP_EXT_THREAD_CHECK};
use clap_sys::factory::plugin_factory::{clap_plugin_factory, CLAP_PLUGIN_FACTORY_ID};
use clap_sys::host::clap_host;
use clap_sys::plugin::clap_plugin;
use clap_sys::process::{clap_process, CLAP_PROCESS_ERROR};
use clap_sys::stream::{clap_istream, clap_ostream};
use clap_sys::version::CLAP_VERSION;
use plugin_host::{
    c_text, di_signal, ensure_bundles, max_diff, peak, reference_chain_render, reference_render,
    PluginSettings,
};
use std::ffi::{c_char, c_void, CStr, CString};
use std::ptr;
use std::sync::atomic::{AtomicBool, AtomicUsize, Ordering};
use std::sync::OnceLock;

/// CLAP id the plugin registers (plugin/README.md, plugin/src/lib.rs).
const PLUGIN_ID: &CStr = c"org.breakdown-project.breakdown";

// ---------------------------------------------------------------------------------------------------------
// Loading the module

struct Module {
    _lib: libloading::Library,
    _entry: *const clap_plugin_entry,
    factory: *const clap_plugin_factory,
}
// SAFETY: the entry and factory are immutable tables the plugin exports for the lifetime of the process; CLAP
// allows calling the factory from any thread after init.
unsafe impl Send for Module {}
unsafe impl Sync for Module {}

static MODULE: OnceLock<Module> = OnceLock::new();
/// Where the plugin's log goes when the tests chose it.
static PLUGIN_LOG: OnceLock<std::path::PathBuf> = OnceLock::new();

/// Wait (up to a few seconds: the plugin's log writer runs on its own thread) for `needle` in the plugin log.
/// None when the log is not ours to read.
fn plugin_log_contains(needle: &str) -> Option<bool> {
    let path = PLUGIN_LOG.get()?;
    for _ in 0..150 {
        if std::fs::read_to_string(path).is_ok_and(|t| t.contains(needle)) {
            return Some(true);
        }
        std::thread::sleep(std::time::Duration::from_millis(20));
    }
    Some(false)
}

/// Load the bundle once per process and never unload it (the plugin's background threads live in it).
fn module() -> &'static Module {
    MODULE.get_or_init(|| {
        ensure_bundles();
        // Send the plugin's log to a file we can read (plugin/README.md: NICE_LOG selects where the log
        // goes), unless the person running the tests chose a place themselves.
        if std::env::var_os("NICE_LOG").is_none() {
            let dir = plugin_host::target_dir().join("clap-host-test");
            std::fs::create_dir_all(&dir).expect("create log dir");
            let log = dir.join("plugin.log");
            let _ = std::fs::remove_file(&log);
            std::env::set_var("NICE_LOG", &log);
            let _ = PLUGIN_LOG.set(log);
        }
        let path = plugin_host::clap_bundle();
        // SAFETY: loading our own plugin; its initialisers only set up logging.
        let lib = unsafe { libloading::Library::new(&path) }
            .unwrap_or_else(|e| panic!("cannot load {}: {e}", path.display()));
        // SAFETY: CLAP modules export a data symbol `clap_entry` of type clap_plugin_entry (entry.h).
        let entry: *const clap_plugin_entry = unsafe {
            *lib.get::<*const clap_plugin_entry>(b"clap_entry\0")
                .expect("the .clap exports clap_entry")
        };
        let entry_ref = unsafe { &*entry };
        assert!(
            entry_ref.clap_version.major >= 1,
            "clap_entry reports CLAP version {}.{}",
            entry_ref.clap_version.major,
            entry_ref.clap_version.minor
        );
        let cpath = CString::new(path.to_string_lossy().as_bytes()).unwrap();
        // SAFETY: entry.h: init is called once with the module's path, before anything else.
        let ok = unsafe { (entry_ref.init.expect("clap_entry.init"))(cpath.as_ptr()) };
        assert!(ok, "clap_entry.init returned false");
        let factory = unsafe {
            (entry_ref.get_factory.expect("clap_entry.get_factory"))(
                CLAP_PLUGIN_FACTORY_ID.as_ptr(),
            )
        } as *const clap_plugin_factory;
        assert!(!factory.is_null(), "no clap.plugin-factory");
        Module {
            _lib: lib,
            _entry: entry,
            factory,
        }
    })
}

// ---------------------------------------------------------------------------------------------------------
// A minimal host

/// What the host records about one instance. The thread that created the instance is the "main thread"; while
/// `process` runs, the calling thread counts as the audio thread (ext/thread-check.h), so the plugin queues
/// main-thread work through request_callback as it must in a DAW.
struct HostState {
    main_thread: std::thread::ThreadId,
    in_process: AtomicBool,
    callback_requested: AtomicBool,
    restart_requested: AtomicBool,
    latency_changed: AtomicUsize,
}

unsafe fn host_state<'a>(h: *const clap_host) -> &'a HostState {
    unsafe { &*((*h).host_data as *const HostState) }
}

unsafe extern "C" fn host_is_main_thread(h: *const clap_host) -> bool {
    let s = unsafe { host_state(h) };
    !s.in_process.load(Ordering::SeqCst) && std::thread::current().id() == s.main_thread
}
unsafe extern "C" fn host_is_audio_thread(h: *const clap_host) -> bool {
    unsafe { host_state(h) }.in_process.load(Ordering::SeqCst)
}
unsafe extern "C" fn host_latency_changed(h: *const clap_host) {
    unsafe { host_state(h) }
        .latency_changed
        .fetch_add(1, Ordering::SeqCst);
}
static HOST_THREAD_CHECK: clap_host_thread_check = clap_host_thread_check {
    is_main_thread: Some(host_is_main_thread),
    is_audio_thread: Some(host_is_audio_thread),
};
static HOST_LATENCY: clap_host_latency = clap_host_latency {
    changed: Some(host_latency_changed),
};

/// The host offers thread-check and latency; every other extension is absent (null), as CLAP allows.
unsafe extern "C" fn host_get_extension(_h: *const clap_host, id: *const c_char) -> *const c_void {
    let id = unsafe { CStr::from_ptr(id) };
    if id == CLAP_EXT_THREAD_CHECK {
        &HOST_THREAD_CHECK as *const clap_host_thread_check as *const c_void
    } else if id == CLAP_EXT_LATENCY {
        &HOST_LATENCY as *const clap_host_latency as *const c_void
    } else {
        ptr::null()
    }
}
unsafe extern "C" fn host_request_restart(h: *const clap_host) {
    unsafe { host_state(h) }
        .restart_requested
        .store(true, Ordering::SeqCst);
}
unsafe extern "C" fn host_request_process(_h: *const clap_host) {}
unsafe extern "C" fn host_request_callback(h: *const clap_host) {
    unsafe { host_state(h) }
        .callback_requested
        .store(true, Ordering::SeqCst);
}

fn new_host(state: &HostState) -> Box<clap_host> {
    Box::new(clap_host {
        clap_version: CLAP_VERSION,
        host_data: state as *const HostState as *mut c_void,
        name: c"breakdown-tests host".as_ptr(),
        vendor: c"Breakdown project".as_ptr(),
        url: c"".as_ptr(),
        version: c"0.1".as_ptr(),
        get_extension: Some(host_get_extension),
        request_restart: Some(host_request_restart),
        request_process: Some(host_request_process),
        request_callback: Some(host_request_callback),
    })
}

/// A list of parameter value events, exposed as clap_input_events.
struct Events {
    list: Vec<clap_event_param_value>,
}

unsafe extern "C" fn events_size(list: *const clap_input_events) -> u32 {
    let ev = unsafe { &*((*list).ctx as *const Events) };
    ev.list.len() as u32
}
unsafe extern "C" fn events_get(
    list: *const clap_input_events,
    i: u32,
) -> *const clap_event_header {
    let ev = unsafe { &*((*list).ctx as *const Events) };
    ev.list
        .get(i as usize)
        .map_or(ptr::null(), |e| &e.header as *const clap_event_header)
}
unsafe extern "C" fn out_push(_l: *const clap_output_events, _e: *const clap_event_header) -> bool {
    true
}

fn param_event(time: u32, id: u32, value: f64) -> clap_event_param_value {
    clap_event_param_value {
        header: clap_event_header {
            size: std::mem::size_of::<clap_event_param_value>() as u32,
            time,
            space_id: CLAP_CORE_EVENT_SPACE_ID,
            type_: CLAP_EVENT_PARAM_VALUE,
            flags: 0,
        },
        param_id: id,
        cookie: ptr::null_mut(),
        note_id: -1,
        port_index: -1,
        channel: -1,
        key: -1,
        value,
    }
}

#[derive(Clone, Debug)]
struct ParamInfo {
    id: u32,
    name: String,
    min: f64,
    max: f64,
    default: f64,
    stepped: bool,
}

/// One plugin instance as a host holds it.
struct Instance {
    plugin: *const clap_plugin,
    _host: Box<clap_host>,
    host_state: Box<HostState>,
    params: *const clap_plugin_params,
    state: *const clap_plugin_state,
    latency: *const clap_plugin_latency,
    ports: *const clap_plugin_audio_ports,
    ports_config: *const clap_plugin_audio_ports_config,
    active: bool,
    processing: bool,
    infos: Vec<ParamInfo>,
    steady_time: i64,
}

impl Instance {
    fn new() -> Instance {
        let m = module();
        let host_state = Box::new(HostState {
            main_thread: std::thread::current().id(),
            in_process: AtomicBool::new(false),
            callback_requested: AtomicBool::new(false),
            restart_requested: AtomicBool::new(false),
            latency_changed: AtomicUsize::new(0),
        });
        let host = new_host(&host_state);
        let f = unsafe { &*m.factory };
        let count = unsafe { (f.get_plugin_count.unwrap())(m.factory) };
        assert!(count >= 1, "the factory lists no plugin");
        let plugin = unsafe {
            (f.create_plugin.unwrap())(m.factory, &*host as *const clap_host, PLUGIN_ID.as_ptr())
        };
        assert!(
            !plugin.is_null(),
            "create_plugin({PLUGIN_ID:?}) returned null"
        );
        let p = unsafe { &*plugin };
        assert!(unsafe { (p.init.unwrap())(plugin) }, "plugin init failed");
        let ext = |id: &CStr| unsafe { (p.get_extension.unwrap())(plugin, id.as_ptr()) };
        let mut inst = Instance {
            plugin,
            _host: host,
            host_state,
            params: ext(CLAP_EXT_PARAMS) as *const clap_plugin_params,
            state: ext(CLAP_EXT_STATE) as *const clap_plugin_state,
            latency: ext(CLAP_EXT_LATENCY) as *const clap_plugin_latency,
            ports: ext(CLAP_EXT_AUDIO_PORTS) as *const clap_plugin_audio_ports,
            ports_config: ext(CLAP_EXT_AUDIO_PORTS_CONFIG) as *const clap_plugin_audio_ports_config,
            active: false,
            processing: false,
            infos: Vec::new(),
            steady_time: 0,
        };
        assert!(!inst.params.is_null(), "no params extension");
        assert!(!inst.state.is_null(), "no state extension");
        assert!(!inst.latency.is_null(), "no latency extension");
        assert!(!inst.ports.is_null(), "no audio-ports extension");
        inst.infos = inst.read_param_infos();
        inst
    }

    fn read_param_infos(&self) -> Vec<ParamInfo> {
        let params = unsafe { &*self.params };
        let n = unsafe { (params.count.unwrap())(self.plugin) };
        (0..n)
            .map(|i| {
                let mut info: clap_param_info = unsafe { std::mem::zeroed() };
                assert!(unsafe { (params.get_info.unwrap())(self.plugin, i, &mut info) });
                ParamInfo {
                    id: info.id,
                    name: c_text(&info.name),
                    min: info.min_value,
                    max: info.max_value,
                    default: info.default_value,
                    stepped: info.flags & CLAP_PARAM_IS_STEPPED != 0,
                }
            })
            .collect()
    }

    /// Parameter by its display name (plugin/README.md's table).
    fn param(&self, name: &str) -> &ParamInfo {
        self.infos
            .iter()
            .find(|p| p.name == name)
            .unwrap_or_else(|| panic!("no parameter named {name:?}"))
    }

    fn value(&self, id: u32) -> f64 {
        let params = unsafe { &*self.params };
        let mut v = f64::NAN;
        assert!(unsafe { (params.get_value.unwrap())(self.plugin, id, &mut v) });
        v
    }

    /// The CLAP value for a displayed text ("0.6", "2", "2x"), through params.text_to_value.
    fn text_to_value(&self, name: &str, text: &str) -> f64 {
        let id = self.param(name).id;
        let params = unsafe { &*self.params };
        let t = CString::new(text).unwrap();
        let mut v = f64::NAN;
        let ok = unsafe { (params.text_to_value.unwrap())(self.plugin, id, t.as_ptr(), &mut v) };
        assert!(ok, "text_to_value({name:?}, {text:?}) failed");
        v
    }

    /// Send parameter values outside processing (params.flush, ext/params.h).
    fn flush(&self, values: &[(&str, &str)]) {
        let events = Events {
            list: values
                .iter()
                .map(|(name, text)| {
                    param_event(0, self.param(name).id, self.text_to_value(name, text))
                })
                .collect(),
        };
        let input = clap_input_events {
            ctx: &events as *const Events as *mut c_void,
            size: Some(events_size),
            get: Some(events_get),
        };
        let output = clap_output_events {
            ctx: ptr::null_mut(),
            try_push: Some(out_push),
        };
        let params = unsafe { &*self.params };
        unsafe { (params.flush.unwrap())(self.plugin, &input, &output) };
    }

    /// Choose an audio-ports configuration by its input/output channel counts (ext/audio-ports-config.h).
    fn select_layout(&self, inputs: u32, outputs: u32) {
        assert!(
            !self.ports_config.is_null(),
            "no audio-ports-config extension"
        );
        let pc = unsafe { &*self.ports_config };
        let n = unsafe { (pc.count.unwrap())(self.plugin) };
        for i in 0..n {
            let mut c: clap_audio_ports_config = unsafe { std::mem::zeroed() };
            assert!(unsafe { (pc.get.unwrap())(self.plugin, i, &mut c) });
            if c.has_main_input
                && c.has_main_output
                && c.main_input_channel_count == inputs
                && c.main_output_channel_count == outputs
            {
                assert!(unsafe { (pc.select.unwrap())(self.plugin, c.id) });
                return;
            }
        }
        panic!("no {inputs} in / {outputs} out configuration offered");
    }

    /// (input channels, output channels) of the main ports.
    fn main_channels(&self) -> (u32, u32) {
        let ports = unsafe { &*self.ports };
        let get = |is_input: bool| {
            let n = unsafe { (ports.count.unwrap())(self.plugin, is_input) };
            assert_eq!(n, 1, "one main port each way");
            let mut info: clap_audio_port_info = unsafe { std::mem::zeroed() };
            assert!(unsafe { (ports.get.unwrap())(self.plugin, 0, is_input, &mut info) });
            info.channel_count
        };
        (get(true), get(false))
    }

    fn activate(&mut self, rate: f64, max_frames: u32) {
        let p = unsafe { &*self.plugin };
        assert!(
            unsafe { (p.activate.unwrap())(self.plugin, rate, 1, max_frames) },
            "activate({rate}, {max_frames}) failed"
        );
        self.active = true;
        assert!(unsafe { (p.start_processing.unwrap())(self.plugin) });
        self.processing = true;
        self.steady_time = 0;
    }

    fn deactivate(&mut self) {
        let p = unsafe { &*self.plugin };
        if self.processing {
            unsafe { (p.stop_processing.unwrap())(self.plugin) };
            self.processing = false;
        }
        if self.active {
            unsafe { (p.deactivate.unwrap())(self.plugin) };
            self.active = false;
        }
    }

    fn latency(&self) -> u32 {
        unsafe { ((*self.latency).get.unwrap())(self.plugin) }
    }

    /// Process one block: `input` channels in, `out_channels` channels out (separate buffers, as most hosts
    /// give), with `events` (times relative to the block).
    fn process_block(
        &mut self,
        input: &[&[f32]],
        output: &mut [Vec<f32>],
        events: Vec<clap_event_param_value>,
    ) {
        let frames = input[0].len();
        let mut in_copy: Vec<Vec<f32>> = input.iter().map(|c| c.to_vec()).collect();
        let mut in_ptrs: Vec<*mut f32> = in_copy.iter_mut().map(|c| c.as_mut_ptr()).collect();
        for c in output.iter_mut() {
            c.clear();
            c.resize(frames, f32::NAN);
        }
        let mut out_ptrs: Vec<*mut f32> = output.iter_mut().map(|c| c.as_mut_ptr()).collect();
        let audio_in = clap_audio_buffer {
            data32: in_ptrs.as_mut_ptr(),
            data64: ptr::null_mut(),
            channel_count: in_ptrs.len() as u32,
            latency: 0,
            constant_mask: 0,
        };
        let mut audio_out = clap_audio_buffer {
            data32: out_ptrs.as_mut_ptr(),
            data64: ptr::null_mut(),
            channel_count: out_ptrs.len() as u32,
            latency: 0,
            constant_mask: 0,
        };
        self.send_block(frames, &audio_in, &mut audio_out, events);
    }

    /// Process one block in place: the host hands the same channel buffers as input and output, as many
    /// DAWs do (clap_process allows it: "the plugin must handle in-place processing").
    fn process_in_place(&mut self, channels: &mut [&mut [f32]]) {
        let frames = channels[0].len();
        let mut ptrs: Vec<*mut f32> = channels.iter_mut().map(|c| c.as_mut_ptr()).collect();
        let audio_in = clap_audio_buffer {
            data32: ptrs.as_mut_ptr(),
            data64: ptr::null_mut(),
            channel_count: ptrs.len() as u32,
            latency: 0,
            constant_mask: 0,
        };
        let mut audio_out = audio_in;
        self.send_block(frames, &audio_in, &mut audio_out, Vec::new());
    }

    /// Hand the plugin one block of `frames` frames with the given buffers and parameter events.
    fn send_block(
        &mut self,
        frames: usize,
        audio_in: &clap_audio_buffer,
        audio_out: &mut clap_audio_buffer,
        events: Vec<clap_event_param_value>,
    ) {
        let events = Events { list: events };
        let in_events = clap_input_events {
            ctx: &events as *const Events as *mut c_void,
            size: Some(events_size),
            get: Some(events_get),
        };
        let out_events = clap_output_events {
            ctx: ptr::null_mut(),
            try_push: Some(out_push),
        };
        let process = clap_process {
            steady_time: self.steady_time,
            frames_count: frames as u32,
            transport: ptr::null(),
            audio_inputs: audio_in,
            audio_outputs: audio_out,
            audio_inputs_count: 1,
            audio_outputs_count: 1,
            in_events: &in_events,
            out_events: &out_events,
        };
        self.call_process(&process);
    }

    /// Call process as the audio thread, then run main-thread work the plugin asked for (request_callback ->
    /// on_main_thread, plugin.h).
    fn call_process(&mut self, process: &clap_process) {
        let p = unsafe { &*self.plugin };
        self.host_state.in_process.store(true, Ordering::SeqCst);
        IN_PLUGIN_PROCESS.with(|w| w.set(true));
        let status = unsafe { (p.process.unwrap())(self.plugin, process) };
        IN_PLUGIN_PROCESS.with(|w| w.set(false));
        self.host_state.in_process.store(false, Ordering::SeqCst);
        assert_ne!(
            status, CLAP_PROCESS_ERROR,
            "process returned CLAP_PROCESS_ERROR"
        );
        self.steady_time += process.frames_count as i64;
        if self
            .host_state
            .callback_requested
            .swap(false, Ordering::SeqCst)
        {
            unsafe { (p.on_main_thread.unwrap())(self.plugin) };
        }
    }

    /// Run whole signals through in blocks of `block` frames; returns the output channels.
    fn run(&mut self, input: &[Vec<f32>], out_channels: usize, block: usize) -> Vec<Vec<f32>> {
        let len = input[0].len();
        let mut result = vec![Vec::with_capacity(len); out_channels];
        let mut out = vec![Vec::new(); out_channels];
        let mut start = 0;
        while start < len {
            let end = (start + block).min(len);
            let chunk: Vec<&[f32]> = input.iter().map(|c| &c[start..end]).collect();
            self.process_block(&chunk, &mut out, Vec::new());
            for (r, o) in result.iter_mut().zip(&out) {
                r.extend_from_slice(o);
            }
            start = end;
        }
        result
    }

    /// Save the state through clap_plugin_state.save into a memory stream (ext/state.h).
    fn save(&self) -> Vec<u8> {
        unsafe extern "C" fn write(s: *const clap_ostream, buf: *const c_void, size: u64) -> i64 {
            let v = unsafe { &mut *((*s).ctx as *mut Vec<u8>) };
            let bytes = unsafe { std::slice::from_raw_parts(buf as *const u8, size as usize) };
            v.extend_from_slice(bytes);
            size as i64
        }
        let mut data: Vec<u8> = Vec::new();
        let stream = clap_ostream {
            ctx: &mut data as *mut Vec<u8> as *mut c_void,
            write: Some(write),
        };
        let ok = unsafe { ((*self.state).save.unwrap())(self.plugin, &stream) };
        assert!(ok, "state save failed");
        data
    }

    /// Load a state from memory; returns what the plugin answered.
    fn load(&self, bytes: &[u8]) -> bool {
        struct Reader<'a> {
            data: &'a [u8],
            pos: usize,
        }
        unsafe extern "C" fn read(s: *const clap_istream, buf: *mut c_void, size: u64) -> i64 {
            let r = unsafe { &mut *((*s).ctx as *mut Reader) };
            let n = (r.data.len() - r.pos).min(size as usize);
            unsafe { ptr::copy_nonoverlapping(r.data[r.pos..].as_ptr(), buf as *mut u8, n) };
            r.pos += n;
            n as i64
        }
        let mut reader = Reader {
            data: bytes,
            pos: 0,
        };
        let stream = clap_istream {
            ctx: &mut reader as *mut Reader as *mut c_void,
            read: Some(read),
        };
        unsafe { ((*self.state).load.unwrap())(self.plugin, &stream) }
    }
}

impl Drop for Instance {
    fn drop(&mut self) {
        self.deactivate();
        let p = unsafe { &*self.plugin };
        unsafe { (p.destroy.unwrap())(self.plugin) };
    }
}

/// Settings for an exact comparison: one position heard, level match off, A/B off, the listening chain without
/// its cabinet (the model's listening output), no trim.
fn exact_settings(inst: &Instance, s: &PluginSettings) {
    let switch = format!("{}", s.position);
    let quality = match s.quality {
        Quality::X1 => "1x",
        Quality::X2 => "2x",
        Quality::X4 => "4x",
        Quality::X8 => "8x",
        Quality::X16 => "16x",
    };
    let gain = format!("{}", s.gain);
    let level = format!("{}", s.level);
    let cal = format!("{}", s.volts_at_full_scale);
    let mut values = vec![
        ("Gain", gain.as_str()),
        ("Level", &level),
        ("Switch position", &switch),
        ("A/B: hear compare-with", "Off"),
        ("Level match", "Off"),
        ("Listening point", "Tone stack + cabinet"),
        ("Cabinet", "None"),
        ("Output trim", "0"),
        ("Quality", quality),
    ];
    // A volts-at-full-scale value sent by a host passes through the parameter's skewed 0..1 range in 32-bit
    // floats and does not land on every typed value (1 V arrives as 0.9999998 V, which the gain stages carry to
    // the output as a few 1e-7 of full scale). The plugin's default is exactly 1 V (plugin/README.md), so that
    // value is left as the plugin holds it rather than sent.
    if s.volts_at_full_scale != 1.0 {
        values.push(("Volts at full scale", &cal));
    }
    inst.flush(&values);
}

/// Check a plugin rendering against the dsp model: plugin output[n + latency] == model[n].
fn check_against_model(
    what: &str,
    out: &[f32],
    reference: &[f32],
    latency: usize,
    model_latency: usize,
) {
    // The plugin reports the oversampling filters' delay (issue 3: "latency is reported to the host"); the
    // model states the same delay for the same quality.
    assert_eq!(
        latency, model_latency,
        "{what}: reported latency {latency} differs from the model's {model_latency}"
    );
    let got = &out[latency..latency + reference.len()];
    let (d, at) = max_diff(got, reference);
    // Same arithmetic in the same order: equal within float rounding (a few f32 ulps of full scale,
    // IEEE 754 single precision: 2^-23 ~ 1.2e-7 relative).
    assert!(
        d <= 4.0 * f32::EPSILON,
        "{what}: plugin differs from the model by {d:e} at sample {at} (plugin {}, model {})",
        got[at],
        reference[at]
    );
    assert!(peak(reference) > 0.01, "{what}: the reference is silent");
}

/// Rates and block sizes a DAW uses (issue 3: 44.1/48/96 kHz, blocks 1, 64 and 4096).
#[test]
fn output_equals_the_model_at_every_rate_and_block_size() {
    let defaults = PluginSettings::default();
    for rate in [44_100.0, 48_000.0, 96_000.0] {
        let input = di_signal(rate, 0.25, 0.7);
        let right: Vec<f32> = input.iter().map(|x| -0.5 * x).collect();
        let (ref_left, model_latency) = reference_render(rate, defaults, &input);
        let (ref_right, _) = reference_render(rate, defaults, &right);
        let mut inst = Instance::new();
        exact_settings(&inst, &defaults);
        for block in [1usize, 64, 4096] {
            inst.activate(rate, block as u32);
            let latency = inst.latency() as usize;
            let (ins, outs) = inst.main_channels();
            assert_eq!((ins, outs), (2, 2), "default layout is stereo in and out");
            let mut padded = [input.clone(), right.clone()];
            for c in padded.iter_mut() {
                c.resize(input.len() + latency, 0.0);
            }
            let out = inst.run(&padded, 2, block);
            let what = format!("{rate} Hz, block {block}");
            check_against_model(
                &format!("{what}, left"),
                &out[0],
                &ref_left,
                latency,
                model_latency,
            );
            check_against_model(
                &format!("{what}, right"),
                &out[1],
                &ref_right,
                latency,
                model_latency,
            );
            inst.deactivate();
        }
    }
}

/// Mono in with stereo out (a guitar DI): one model, the same signal on both outputs.
#[test]
fn mono_in_stereo_out_equals_the_model() {
    let rate = 48_000.0;
    let s = PluginSettings::default();
    let input = di_signal(rate, 0.25, 0.7);
    let (reference, model_latency) = reference_render(rate, s, &input);
    for (outs, name) in [(2u32, "mono in, stereo out"), (1, "mono in, mono out")] {
        let mut inst = Instance::new();
        inst.select_layout(1, outs);
        exact_settings(&inst, &s);
        inst.activate(rate, 512);
        assert_eq!(inst.main_channels(), (1, outs));
        let latency = inst.latency() as usize;
        let mut padded = input.clone();
        padded.resize(input.len() + latency, 0.0);
        let out = inst.run(&[padded], outs as usize, 512);
        for (c, ch) in out.iter().enumerate() {
            check_against_model(
                &format!("{name}, channel {c}"),
                ch,
                &reference,
                latency,
                model_latency,
            );
        }
    }
}

/// In-place buffers (input and output the same memory), stereo at 48 kHz: the same output as the model.
#[test]
fn in_place_processing_equals_the_model() {
    let rate = 48_000.0;
    let s = PluginSettings::default();
    let input = di_signal(rate, 0.2, 0.7);
    let (reference, model_latency) = reference_render(rate, s, &input);
    let mut inst = Instance::new();
    exact_settings(&inst, &s);
    inst.activate(rate, 256);
    let latency = inst.latency() as usize;
    let mut left = input.clone();
    left.resize(input.len() + latency, 0.0);
    let mut right = left.clone();
    for (l, r) in left.chunks_mut(256).zip(right.chunks_mut(256)) {
        inst.process_in_place(&mut [l, r]);
    }
    check_against_model("in place, left", &left, &reference, latency, model_latency);
    check_against_model(
        "in place, right",
        &right,
        &reference,
        latency,
        model_latency,
    );
}

/// Changing the quality while playing: the plugin builds the new models off the audio thread, crossfades, and
/// reports the new latency the way ext/latency.h asks — it requests a restart, and once the host re-activates
/// it, tells the host through clap_host_latency.changed and answers the new figure from latency.get.
#[test]
fn quality_change_while_playing_updates_the_reported_latency() {
    let rate = 48_000.0;
    let block = 256usize;
    let model_latency = |q: Quality| {
        let s = PluginSettings {
            quality: q,
            ..PluginSettings::default()
        };
        reference_render(rate, s, &[0.0]).1
    };
    let start = model_latency(Quality::X4);
    // A quality whose filters delay differently from 4x, so the report has to change.
    let (target_name, target) = [
        ("1x", Quality::X1),
        ("2x", Quality::X2),
        ("8x", Quality::X8),
        ("16x", Quality::X16),
    ]
    .into_iter()
    .map(|(n, q)| (n, model_latency(q)))
    .find(|(_, l)| *l != start)
    .expect("some quality has a different latency from 4x");

    let mut inst = Instance::new();
    exact_settings(&inst, &PluginSettings::default());
    inst.activate(rate, block as u32);
    assert_eq!(inst.latency() as usize, start, "latency at 4x");
    let quality = inst.param("Quality").id;
    let value = inst.text_to_value("Quality", target_name);
    let input = di_signal(rate, 0.5, 0.7);
    let mut out = vec![Vec::new(); 2];
    let mut restarts = 0;
    let mut n = 0usize;
    // Play until the host has been told (at most ~2000 blocks, about 10 s of audio, with short pauses so the
    // plugin's background thread gets the CPU on a busy machine).
    for i in 0..2000 {
        let events = if i == 0 {
            vec![param_event(0, quality, value)]
        } else {
            Vec::new()
        };
        let x: Vec<f32> = (0..block).map(|k| input[(n + k) % input.len()]).collect();
        n += block;
        inst.process_block(&[&x, &x], &mut out, events);
        assert!(out.iter().flatten().all(|y| y.is_finite()));
        if inst
            .host_state
            .restart_requested
            .swap(false, Ordering::SeqCst)
        {
            // What a host does on request_restart: deactivate and activate again (plugin.h).
            inst.deactivate();
            inst.activate(rate, block as u32);
            restarts += 1;
        }
        if inst.host_state.latency_changed.load(Ordering::SeqCst) > 0 {
            break;
        }
        std::thread::sleep(std::time::Duration::from_millis(2));
    }
    assert!(
        restarts >= 1,
        "the plugin never asked the host for a restart"
    );
    assert!(
        inst.host_state.latency_changed.load(Ordering::SeqCst) >= 1,
        "the plugin never called clap_host_latency.changed"
    );
    assert_eq!(
        inst.latency() as usize,
        target,
        "latency after switching to {target_name}"
    );
}

/// Every parameter automated across its whole range with events inside the blocks: the output stays finite
/// and bounded, the plugin keeps answering, and each parameter reads back the last value sent (ext/params.h:
/// the plugin's value follows the host's events).
#[test]
fn automating_every_parameter_keeps_the_output_finite() {
    let rate = 48_000.0;
    let block = 64usize;
    let mut inst = Instance::new();
    inst.activate(rate, block as u32);
    let infos = inst.infos.clone();
    // Every parameter plugin/README.md documents, by display name.
    for name in [
        "Gain",
        "Level",
        "Treble",
        "Middle",
        "Bass",
        "Switch position",
        "Compare with",
        "A/B: hear compare-with",
        "Candidate positive Vz",
        "Candidate negative Vz",
        "Candidate family",
        "Snap to E24",
        "Volts at full scale",
        "Output trim",
        "Quality",
        "Listening point",
        "Cabinet",
        "Level match",
        "Run all positions",
    ] {
        assert!(
            infos.iter().any(|p| p.name == name),
            "parameter {name:?} missing"
        );
    }
    let input = di_signal(rate, 0.1, 0.9);
    let mut out = vec![Vec::new(); 2];
    let mut pos = 0usize;
    let mut next_input = |n: usize| -> Vec<f32> {
        let v: Vec<f32> = (0..n).map(|i| input[(pos + i) % input.len()]).collect();
        pos += n;
        v
    };
    let mut worst = 0.0f32;
    for info in &infos {
        // 40 blocks sweeping min -> max -> min, four events per block at different sample offsets.
        let blocks = 40usize;
        let mut last = info.default;
        for b in 0..blocks {
            let mut events = Vec::new();
            for k in 0..4 {
                let t = (b * 4 + k) as f64 / (blocks * 4 - 1) as f64;
                let tri = 1.0 - (2.0 * t - 1.0).abs();
                let mut v = info.min + (info.max - info.min) * tri;
                if info.stepped {
                    v = v.round();
                }
                last = v;
                events.push(param_event((k * block / 4) as u32, info.id, v));
            }
            let x = next_input(block);
            inst.process_block(&[&x, &x], &mut out, events);
            for ch in &out {
                for &y in ch {
                    assert!(
                        y.is_finite(),
                        "non-finite output while automating {:?}",
                        info.name
                    );
                    worst = worst.max(y.abs());
                }
            }
        }
        let read = inst.value(info.id);
        assert!(
            (read - last).abs() <= 1e-6 * (info.max - info.min).max(1.0),
            "{:?}: last value sent {last}, plugin reports {read}",
            info.name
        );
        // Back to the default for the next parameter.
        let x = next_input(block);
        inst.process_block(
            &[&x, &x],
            &mut out,
            vec![param_event(0, info.id, info.default)],
        );
    }
    // With +24 dB of trim, or volts at full scale at 20 V, the wiper can swing past full scale, but the stage
    // is powered from its supply (300 V): the listening output (wiper / 20 V) stays within a few tens of units.
    assert!(worst < 100.0, "output peak {worst} while automating");
    // Still processing after everything: the output moves with the input.
    let x = next_input(4096.min(input.len()));
    let mut tail = vec![Vec::new(); 2];
    for chunk in x.chunks(block) {
        inst.process_block(&[chunk, chunk], &mut tail, Vec::new());
    }
    assert!(peak(&tail[0]) > 1e-4, "silent after automation");
}

/// Save the state of a changed instance, load it into a fresh instance: same parameter values, identical
/// output, and both equal the model for those settings.
#[test]
fn saved_state_reloads_into_a_fresh_instance_with_identical_output() {
    let rate = 48_000.0;
    let s = PluginSettings {
        gain: 0.6,
        level: 0.7,
        position: 2,
        quality: Quality::X2,
        volts_at_full_scale: 1.0,
    };
    let input = di_signal(rate, 0.2, 0.8);
    let (reference, model_latency) = reference_render(rate, s, &input);

    let render = |inst: &mut Instance| {
        inst.activate(rate, 256);
        let latency = inst.latency() as usize;
        let mut padded = input.clone();
        padded.resize(input.len() + latency, 0.0);
        let out = inst.run(&[padded.clone(), padded], 2, 256);
        inst.deactivate();
        (out, latency)
    };

    let mut a = Instance::new();
    exact_settings(&a, &s);
    let (out_a, latency_a) = render(&mut a);
    check_against_model(
        "changed settings",
        &out_a[0],
        &reference,
        latency_a,
        model_latency,
    );
    let state = a.save();
    assert!(state.len() > 8, "state of {} bytes", state.len());

    let mut b = Instance::new();
    assert!(b.load(&state), "fresh instance refused the saved state");
    for info in &a.infos {
        assert_eq!(
            a.value(info.id),
            b.value(info.id),
            "{:?} after reload",
            info.name
        );
    }
    let (out_b, latency_b) = render(&mut b);
    assert_eq!(latency_a, latency_b);
    assert!(out_a == out_b, "output after reloading the state differs");
    // And the reloaded instance saves the same state again.
    assert_eq!(b.save(), state, "state changed across save/load/save");
}

/// Damaged states (truncated, random bytes, a wrong length, a newer version of our own field) never crash; the
/// instance keeps processing; a state whose `breakdown` field is from a newer version loads as the defaults
/// (the default listening chain: the model's listening output through the built-in cabinet).
#[test]
fn damaged_state_loads_defaults_and_keeps_processing() {
    let rate = 48_000.0;
    let defaults = PluginSettings::default();
    let input = di_signal(rate, 0.15, 0.7);
    let (reference, model_latency) = reference_chain_render(rate, defaults, &input);

    let changed = Instance::new();
    changed.flush(&[
        ("Gain", "0.3"),
        ("Switch position", "2"),
        ("Output trim", "6"),
    ]);
    let good = changed.save();

    // A pseudo-random byte string (xorshift from a fixed start value) with and without a plausible length prefix.
    let mut state = 0x2545_f491_4f6c_dd1du64;
    let mut garbage: Vec<u8> = (0..600)
        .map(|_| {
            state ^= state << 13;
            state ^= state >> 7;
            state ^= state << 17;
            state as u8
        })
        .collect();
    let mut prefixed = (592u64).to_le_bytes().to_vec();
    prefixed.extend_from_slice(&garbage[..592]);
    garbage[..8].copy_from_slice(&u64::MAX.to_le_bytes());

    // The same state with our own `breakdown` field replaced (None: removed), framed as the plugin frames it.
    let json: serde_json::Value = serde_json::from_slice(&good[8..])
        .expect("the saved state is JSON after its 8-byte length");
    assert!(
        json.get("fields")
            .and_then(|f| f.get("breakdown"))
            .is_some(),
        "state carries the 'breakdown' field"
    );
    let with_field = |field: Option<&str>| {
        let mut v = json.clone();
        let fields = v
            .get_mut("fields")
            .and_then(|f| f.as_object_mut())
            .expect("state has a 'fields' object");
        match field {
            Some(text) => {
                fields.insert("breakdown".into(), serde_json::Value::String(text.into()));
            }
            None => {
                fields.remove("breakdown");
            }
        }
        let text = serde_json::to_vec(&v).unwrap();
        let mut bytes = (text.len() as u64).to_le_bytes().to_vec();
        bytes.extend_from_slice(&text);
        bytes
    };

    let cases: Vec<(&str, Vec<u8>)> = vec![
        ("empty", Vec::new()),
        ("truncated to half", good[..good.len() / 2].to_vec()),
        ("length only", good[..8].to_vec()),
        ("random bytes, huge length", garbage),
        ("random bytes, plausible length", prefixed),
        (
            "newer 'breakdown' version",
            with_field(Some(r#"{"version": 999, "scope_ms": 20.0}"#)),
        ),
        (
            "older 'breakdown' version",
            with_field(Some(r#"{"version": 0, "scope_ms": 20.0}"#)),
        ),
        ("missing 'breakdown' field", with_field(None)),
        (
            "damaged 'breakdown' field",
            with_field(Some("{\"version\": 1, ")),
        ),
    ];
    for (name, bytes) in cases {
        let mut inst = Instance::new();
        let _answer = inst.load(&bytes);
        // Every parameter is at its default: either the state was refused (a fresh instance holds defaults)
        // or it was repaired to the defaults.
        for info in &inst.infos {
            let v = inst.value(info.id);
            assert!(
                (v - info.default).abs() <= 1e-6,
                "{name}: {:?} is {v}, default {}",
                info.name,
                info.default
            );
        }
        inst.activate(rate, 128);
        let latency = inst.latency() as usize;
        let mut padded = input.clone();
        padded.resize(input.len() + latency, 0.0);
        let out = inst.run(&[padded.clone(), padded], 2, 128);
        check_against_model(
            &format!("after loading a {name} state"),
            &out[0],
            &reference,
            latency,
            model_latency,
        );
    }
    // The reasons are logged (issue 3: "loads to defaults with a logged reason"); the texts are the plugin's
    // StateProblem messages (plugin/src/params.rs).
    match plugin_log_contains("newer than this plugin's") {
        Some(found) => assert!(
            found,
            "no logged reason for the newer state in the plugin log"
        ),
        None => eprintln!("NICE_LOG set by the caller: the logged reason is not checked"),
    }
}

/// A circuit file of our own invented values: the one-stage circuit's layout (presets-demo/one-stage.toml) with
/// other part values, a four-way switch, and one part with its own knee data (the 1N5228B row of
/// dsp/src/parts.rs, a table typed from memory; any in-range figures do for this test).
const INVENTED_CIRCUIT: &str = r#"
name = "invented bench circuit"
supply_volts = 285.0

[input]
volts_at_full_scale = 0.5

[gain_stage]
tube = "12AX7"
gain_pot_law = "log"
grid_stopper = 33e3
plate_resistor = 150e3
cathode_resistor = 1.8e3
cathode_bypass = 10e-6

[follower]
tube = "12AX7"
cathode_resistor = 82e3

[clamp]
coupling_cap = 47e-9
feed_resistor = 10e3
level_pot = 500e3
level_pot_law = "log"
placement = "at-wiper"
load_resistor = 470e3

[[clamp.position]]
name = "open"

[[clamp.position]]
name = "15 / 15"
positive = { volts = 15.0 }
negative = { volts = 15.0 }

[[clamp.position]]
name = "10 / 3.9 own knee"
positive = { volts = 10.0 }
negative = { volts = 3.9, izt = 0.02, zzt = 23.0, izk = 0.00025, zzk = 1900.0 }

[[clamp.position]]
name = "6.8 / 6.8"
positive = { volts = 6.8 }
negative = { volts = 6.8 }
"#;

/// A saved CLAP state (8-byte little-endian length, then the framework's JSON) with our `breakdown` field set
/// to `field`.
fn state_with_field(saved: &[u8], field: serde_json::Value) -> Vec<u8> {
    let mut json: serde_json::Value = serde_json::from_slice(&saved[8..])
        .expect("the saved state is JSON after its 8-byte length");
    json["fields"]["breakdown"] = serde_json::Value::String(field.to_string());
    let text = serde_json::to_vec(&json).unwrap();
    let mut bytes = (text.len() as u64).to_le_bytes().to_vec();
    bytes.extend_from_slice(&text);
    bytes
}

/// The session's circuit travels in the state: a circuit file of our own loaded through the state renders what
/// `breakdown_dsp::Engine::render` renders on that file with the same settings (after the reported latency);
/// the instance saves it, a fresh instance reloads it and plays identically, and saves the same state again.
#[test]
fn a_circuit_loaded_through_the_state_plays_like_the_renderer_and_survives_save_and_reload() {
    use breakdown_dsp::Circuit;
    let rate = 48_000.0;
    let circuit = Circuit::from_toml(INVENTED_CIRCUIT).expect("our invented circuit parses");
    let s = PluginSettings {
        gain: 0.7,
        level: 0.6,
        position: 2,
        quality: Quality::X2,
        // The file's own [input] value; the plugin's parameter is the session's calibration.
        volts_at_full_scale: 0.5,
    };
    let input = di_signal(rate, 0.25, 0.8);
    let (reference, model_latency) = plugin_host::reference_render_on(&circuit, rate, s, &input);
    // It really is another circuit: the built-in one plays something else with the same settings.
    let (builtin, _) = reference_render(rate, s, &input);
    assert!(
        max_diff(&builtin, &reference).0 > 1e-3,
        "the invented circuit renders like the built-in one"
    );

    let template = Instance::new();
    exact_settings(&template, &s);
    let session = state_with_field(
        &template.save(),
        serde_json::json!({
            "version": 2,
            "scope_ms": 20.0,
            "circuit": INVENTED_CIRCUIT,
            "circuit_file": "invented.toml",
        }),
    );
    let render = |inst: &mut Instance| {
        inst.activate(rate, 256);
        let latency = inst.latency() as usize;
        let mut padded = input.clone();
        padded.resize(input.len() + latency, 0.0);
        let out = inst.run(&[padded.clone(), padded], 2, 256);
        inst.deactivate();
        (out, latency)
    };
    let mut a = Instance::new();
    assert!(
        a.load(&session),
        "the plugin refused a state with our circuit"
    );
    let (out_a, latency_a) = render(&mut a);
    for (c, ch) in out_a.iter().enumerate() {
        check_against_model(
            &format!("circuit from the state, channel {c}"),
            ch,
            &reference,
            latency_a,
            model_latency,
        );
    }

    let saved = a.save();
    let json: serde_json::Value = serde_json::from_slice(&saved[8..]).unwrap();
    let field: serde_json::Value =
        serde_json::from_str(json["fields"]["breakdown"].as_str().expect("our field")).unwrap();
    assert_eq!(
        field["circuit"].as_str(),
        Some(INVENTED_CIRCUIT),
        "the saved state carries the circuit"
    );
    assert_eq!(field["version"], 2);

    let mut b = Instance::new();
    assert!(b.load(&saved), "a fresh instance refused the saved state");
    let (out_b, latency_b) = render(&mut b);
    assert_eq!(latency_a, latency_b);
    assert!(out_a == out_b, "output after reloading the state differs");
    assert_eq!(b.save(), saved, "state changed across save/load/save");
}

/// A state whose circuit does not read (a value out of its range) loads with the built-in circuit, keeps its
/// other settings, plays the built-in circuit exactly, and logs why.
#[test]
fn a_state_with_a_refused_circuit_runs_the_builtin_circuit_with_the_reason_logged() {
    let rate = 48_000.0;
    let s = PluginSettings {
        gain: 0.6,
        position: 2,
        ..PluginSettings::default()
    };
    let input = di_signal(rate, 0.15, 0.7);
    let (reference, model_latency) = reference_render(rate, s, &input);
    let template = Instance::new();
    exact_settings(&template, &s);
    let bad = INVENTED_CIRCUIT.replace("supply_volts = 285.0", "supply_volts = 2850.0");
    let session = state_with_field(
        &template.save(),
        serde_json::json!({ "version": 2, "scope_ms": 20.0, "circuit": bad }),
    );
    let mut inst = Instance::new();
    assert!(inst.load(&session));
    assert_eq!(
        inst.value(inst.param("Gain").id),
        0.6f32 as f64,
        "other settings kept"
    );
    inst.activate(rate, 128);
    let latency = inst.latency() as usize;
    let mut padded = input.clone();
    padded.resize(input.len() + latency, 0.0);
    let out = inst.run(&[padded.clone(), padded], 2, 128);
    check_against_model(
        "after a refused circuit",
        &out[0],
        &reference,
        latency,
        model_latency,
    );
    match plugin_log_contains("the saved circuit is refused") {
        Some(found) => assert!(found, "no logged reason for the refused circuit"),
        None => eprintln!("NICE_LOG set by the caller: the logged reason is not checked"),
    }
}

/// A small deterministic generator for the soak (xorshift64*, Vigna 2016): reproducible runs.
struct SoakRng(u64);

impl SoakRng {
    fn next(&mut self) -> u64 {
        self.0 ^= self.0 >> 12;
        self.0 ^= self.0 << 25;
        self.0 ^= self.0 >> 27;
        self.0.wrapping_mul(0x2545_f491_4f6c_dd1d)
    }
    /// Uniform in [0, 1).
    fn unit(&mut self) -> f64 {
        (self.next() >> 11) as f64 / (1u64 << 53) as f64
    }
    fn below(&mut self, n: usize) -> usize {
        (self.next() % n as u64) as usize
    }
}

/// What a soak segment feeds the plugin.
#[derive(Clone, Copy, Debug)]
enum SoakSignal {
    Noise,
    Silence,
    Dc,
    Square,
    Guitar,
    Bursts,
}

/// Largest output magnitude the soak accepts at `rate` (full-scale units), stated from the circuit: every node
/// of the built-in preamp stays within its highest supply of ground on either side (a coupling cap charged to
/// B+ can pull its far side B+ below ground), the listening output is a node over `[listen]
/// volts_at_full_scale`, the output trim adds at most +24 dB, and the built-in cabinet's output is at most the
/// sum of its response's magnitudes times its input's peak (the convolution sum's bound).
fn soak_bound(rate: f64) -> f32 {
    let c = breakdown_dsp::Circuit::builtin();
    let supply = c
        .preamp
        .iter()
        .filter_map(|p| p.supply_volts)
        .fold(c.supply_volts, f64::max);
    let cabinet = breakdown_dsp::cabinet::Cabinet::builtin(rate, 1).unwrap();
    let l1: f64 = cabinet.response()[0].iter().map(|h| h.abs()).sum();
    (2.0 * supply / c.listen.volts_at_full_scale * 10f64.powf(24.0 / 20.0) * l1.max(1.0)) as f32
}

/// Ten minutes of audio per CI run (SOAK_SECONDS overrides the total), split over two tests so the halves run
/// on two cores. Most of the audio is at the rates sessions use (22.05 kHz 180 s, 44.1 kHz 140 s, 48 kHz 225 s); the
/// high rates get less (96 kHz 30 s, 192 kHz 15 s, 384 kHz 10 s) because a second there costs up to eight
/// times as many model steps, and hostile full-scale noise at the most sensitive calibration costs about 40
/// times a DI's step (Newton's damped steps; measured with `dsp/examples/stress_probe.rs`).
fn soak_total_seconds() -> f64 {
    std::env::var("SOAK_SECONDS")
        .ok()
        .and_then(|s| s.parse().ok())
        .unwrap_or(600.0)
}

#[test]
fn soak_at_22_and_44_khz_random_automation_blocks_states_and_hostile_input() {
    let t = soak_total_seconds() / 600.0;
    soak(
        &[(22_050.0, 180.0 * t), (44_100.0, 140.0 * t)],
        0x005e_ed0f_b4ea_cd0e ^ 0x1234_5678,
    );
}

#[test]
fn soak_at_48_khz_and_high_rates_random_automation_blocks_states_and_hostile_input() {
    let t = soak_total_seconds() / 600.0;
    soak(
        &[
            (48_000.0, 225.0 * t),
            (96_000.0, 30.0 * t),
            (192_000.0, 15.0 * t),
            (384_000.0, 10.0 * t),
        ],
        0x0b5e_55ed_2026_1204,
    );
}

/// Audio through the CLAP plugin at each `(rate, seconds)`: random sample-accurate automation of every
/// parameter (extremes included), switch and quality changes, state loads mid-stream (good and damaged),
/// random block sizes, on noise, silence, DC, full-scale squares, a DI and NaN/Inf bursts. Every output
/// sample is finite and within `soak_bound`; no heap allocation happens inside `process` (counted by this
/// binary's allocator); after each decaying tail no output sample is subnormal (flush-to-zero works), and
/// the median over the tails of their block cost against the loud blocks' is at most 2 (a ratio measured
/// within the run, not a wall-clock limit).
fn soak(rates: &[(f64, f64)], seed: u64) {
    let total_seconds: f64 = rates.iter().map(|r| r.1).sum();
    let mut rng = SoakRng(seed);
    let mut inst = Instance::new();
    // A mono DI track with a stereo output, as a guitar track usually is.
    inst.select_layout(1, 2);
    let infos = inst.infos.clone();
    let quality = inst.param("Quality").id;
    let position = inst.param("Switch position").id;
    let mut saved: Vec<Vec<u8>> = Vec::new();
    let (mut worst, mut audio_seconds, mut state_loads) = (0.0f32, 0.0f64, 0usize);
    let mut tail_ratios = Vec::new();
    let allocations_before = process_allocations();
    let mut cost_per_rate = Vec::new();
    for &(rate, seconds_wanted) in rates {
        let started = std::time::Instant::now();
        let max_block = [64u32, 512, 4096][rng.below(3)];
        inst.activate(rate, max_block);
        let bound = soak_bound(rate);
        let mut seconds_here = 0.0;
        let mut tailed_here = false;
        while seconds_here < seconds_wanted {
            let signal = [
                SoakSignal::Noise,
                SoakSignal::Silence,
                SoakSignal::Dc,
                SoakSignal::Square,
                SoakSignal::Guitar,
                SoakSignal::Bursts,
            ][rng.below(6)];
            let seconds = 0.5 + 2.5 * rng.unit();
            let frames = (seconds * rate) as usize;
            let level = [1.0, 0.5, 0.05, 1e-6][rng.below(4)] as f32;
            let square_period = (rate / (20.0 + 5000.0 * rng.unit())).max(2.0) as usize;
            let dc = (2.0 * rng.unit() - 1.0) as f32;
            let guitar = di_signal(rate, 1.0, 0.9);
            // The quality parameter is a choice index (0 = 1x ... 4 = 16x). Automated up to the highest
            // oversampling that keeps the model's internal rate at or below 200 kHz (4x at 44.1 and 48 kHz,
            // 1x at 192 and 384 kHz), so ten minutes of audio stay within the CI budget; at the lowest rate
            // every choice up to 16x is reached.
            let internal_cap = if rate < 30_000.0 {
                400_000.0
            } else {
                200_000.0
            };
            let quality_max = (0..=4)
                .rev()
                .find(|&i| rate * f64::from(1u32 << i) <= internal_cap)
                .unwrap_or(0) as f64;
            let mut done = 0usize;
            let mut out = vec![Vec::new(); 2];
            let mut recap_quality = true;
            while done < frames {
                let block = if rng.below(4) == 0 {
                    max_block as usize
                } else {
                    1 + rng.below(max_block as usize)
                }
                .min(frames - done);
                let x: Vec<f32> = (0..block)
                    .map(|i| {
                        let n = done + i;
                        match signal {
                            SoakSignal::Noise => level * (2.0 * rng.unit() as f32 - 1.0),
                            SoakSignal::Silence => 0.0,
                            SoakSignal::Dc => dc,
                            SoakSignal::Square => {
                                if (n / (square_period / 2).max(1)).is_multiple_of(2) {
                                    1.0
                                } else {
                                    -1.0
                                }
                            }
                            SoakSignal::Guitar => guitar[n % guitar.len()],
                            SoakSignal::Bursts => match rng.below(2000) {
                                0 => f32::NAN,
                                1 => f32::INFINITY,
                                2 => f32::NEG_INFINITY,
                                3 => f32::MAX,
                                _ => level * (2.0 * rng.unit() as f32 - 1.0),
                            },
                        }
                    })
                    .collect();
                // Sample-accurate automation: up to four events at random offsets, sorted by time.
                let mut events = Vec::new();
                if rng.below(3) == 0 {
                    let mut times: Vec<u32> = (0..1 + rng.below(4))
                        .map(|_| rng.below(block) as u32)
                        .collect();
                    times.sort_unstable();
                    for t in times {
                        let info = &infos[rng.below(infos.len())];
                        let mut v = match rng.below(4) {
                            0 => info.min,
                            1 => info.max,
                            _ => info.min + (info.max - info.min) * rng.unit(),
                        };
                        if info.stepped {
                            v = v.round();
                        }
                        if info.id == quality {
                            v = v.min(quality_max);
                        }
                        events.push(param_event(t, info.id, v));
                    }
                }
                if recap_quality {
                    // A loaded state (good or damaged) may carry a higher quality than this rate's cap: the
                    // host automation brings it back at once (the load itself is still exercised).
                    events.insert(
                        0,
                        param_event(0, quality, rng.below(quality_max as usize + 1) as f64),
                    );
                    recap_quality = false;
                }
                if rng.below(50) == 0 {
                    // A rapid switch change at the start of the block.
                    let info = infos.iter().find(|p| p.id == position).unwrap();
                    let v = (info.min + (info.max - info.min) * rng.unit()).round();
                    events.insert(0, param_event(0, position, v));
                }
                inst.process_block(&[&x], &mut out, events);
                for ch in &out {
                    for &y in ch {
                        assert!(
                            y.is_finite(),
                            "non-finite output at {rate} Hz on {signal:?}"
                        );
                        worst = worst.max(y.abs());
                    }
                }
                assert!(
                    worst <= bound,
                    "output peak {worst} above the stated bound {bound} at {rate} Hz on {signal:?}"
                );
                done += block;
            }
            // State saves and loads between segments, as a host does on the main thread.
            match rng.below(4) {
                0 => saved.push(inst.save()),
                1 if !saved.is_empty() => {
                    let s = &saved[rng.below(saved.len())];
                    assert!(inst.load(s), "a state the plugin saved was refused");
                    state_loads += 1;
                }
                2 if !saved.is_empty() => {
                    // A damaged copy: loaded with defaults or refused, never a crash.
                    let mut s = saved[rng.below(saved.len())].clone();
                    for _ in 0..4 {
                        let i = rng.below(s.len().max(1));
                        if let Some(b) = s.get_mut(i) {
                            *b ^= 1 << rng.below(8);
                        }
                    }
                    let _ = inst.load(&s);
                    state_loads += 1;
                }
                _ => {}
            }
            seconds_here += frames as f64 / rate;
            // After a loud segment, a decaying tail: the input stops and the circuit rings down.
            // (The first segment at each rate always gets one, so a short run still checks the tails.)
            if (matches!(signal, SoakSignal::Guitar | SoakSignal::Noise) && level >= 0.5)
                || !tailed_here
            {
                tailed_here = true;
                let block = 256.min(max_block as usize);
                let silence = vec![0.0f32; block];
                let loud: Vec<f32> = (0..block).map(|n| guitar[n % guitar.len()]).collect();
                let mut steady = Vec::new();
                for _ in 0..64 {
                    let t = std::time::Instant::now();
                    inst.process_block(&[&loud], &mut out, Vec::new());
                    steady.push(t.elapsed().as_secs_f64());
                }
                let mut tail = Vec::new();
                let mut subnormal = 0usize;
                let tail_blocks = (1.5 * rate / block as f64) as usize;
                for _ in 0..tail_blocks {
                    let t = std::time::Instant::now();
                    inst.process_block(&[&silence], &mut out, Vec::new());
                    tail.push(t.elapsed().as_secs_f64());
                    for ch in &out {
                        subnormal += ch.iter().filter(|y| y.is_subnormal()).count();
                        assert!(ch.iter().all(|y| y.is_finite()));
                    }
                }
                assert_eq!(
                    subnormal, 0,
                    "subnormal output samples on a tail at {rate} Hz"
                );
                steady.sort_by(f64::total_cmp);
                tail.sort_by(f64::total_cmp);
                tail_ratios.push(tail[tail.len() / 2] / steady[steady.len() / 2]);
                seconds_here += (64 + tail_blocks) as f64 * block as f64 / rate;
            }
        }
        audio_seconds += seconds_here;
        inst.deactivate();
        cost_per_rate.push((rate, seconds_here, started.elapsed().as_secs_f64()));
    }
    let allocations = process_allocations() - allocations_before;
    assert_eq!(
        allocations, 0,
        "{allocations} heap allocations or frees on the audio thread inside process during the soak"
    );
    for (rate, audio, wall) in &cost_per_rate {
        eprintln!("soak: {rate} Hz: {audio:.0} s of audio took {wall:.1} s here");
    }
    tail_ratios.sort_by(f64::total_cmp);
    eprintln!(
        "soak: {audio_seconds:.0} s of audio, output peak {worst:.2} (bound at {} Hz {:.0}), {state_loads} state loads; tail/steady \
         median block cost {:.2} (worst tail {:.2})",
        rates[0].0,
        soak_bound(rates[0].0),
        tail_ratios.get(tail_ratios.len() / 2).copied().unwrap_or(f64::NAN),
        tail_ratios.last().copied().unwrap_or(f64::NAN)
    );
    assert!(
        audio_seconds >= total_seconds,
        "only {audio_seconds} s of audio"
    );
    assert!(state_loads > 0, "the soak loaded no state");
    // The issue's denormal rule as a ratio measured within this run (median over every tail of the median
    // block cost on the tail over the median on the loud blocks just before it), not a wall-clock limit.
    assert!(!tail_ratios.is_empty(), "the soak played no decaying tail");
    let median_tail = tail_ratios[tail_ratios.len() / 2];
    assert!(
        median_tail <= 2.0,
        "decaying tails cost {median_tail:.2}x the steady blocks (denormals not flushed?)"
    );
}

/// Base64 (RFC 4648 section 4, padded), written here independently of the plugin's own encoder.
fn base64(bytes: &[u8]) -> String {
    const A: &[u8] = b"ABCDEFGHIJKLMNOPQRSTUVWXYZabcdefghijklmnopqrstuvwxyz0123456789+/";
    let mut out = String::new();
    for c in bytes.chunks(3) {
        let n = (c[0] as u32) << 16
            | (*c.get(1).unwrap_or(&0) as u32) << 8
            | *c.get(2).unwrap_or(&0) as u32;
        for k in 0..4 {
            out.push(if k <= c.len() {
                A[(n >> (18 - 6 * k) & 63) as usize] as char
            } else {
                '='
            });
        }
    }
    out
}

/// A mono 32-bit float WAV file in memory (hound).
fn wav_bytes(rate: u32, samples: &[f32]) -> Vec<u8> {
    let spec = hound::WavSpec {
        channels: 1,
        sample_rate: rate,
        bits_per_sample: 32,
        sample_format: hound::SampleFormat::Float,
    };
    let mut cursor = std::io::Cursor::new(Vec::new());
    {
        let mut w = hound::WavWriter::new(&mut cursor, spec).expect("a WAV writer");
        for s in samples {
            w.write_sample(*s).unwrap();
        }
        w.finalize().unwrap();
    }
    cursor.into_inner()
}

/// An invented cabinet-like response: a unit first tap and a decaying 2.2 kHz ring, 80 ms at `rate`.
fn invented_ir(rate: u32) -> Vec<f32> {
    (0..rate as usize * 8 / 100)
        .map(|k| {
            let t = k as f64 / rate as f64;
            let ring = 0.6 * (-t / 0.005).exp() * (2.0 * std::f64::consts::PI * 2200.0 * t).sin();
            (if k == 0 { 1.0 } else { 0.0 } + ring) as f32
        })
        .collect()
}

/// The cabinet's impulse response travels in the state: a WAV file of our own put in the `breakdown` field
/// (as base64 of its bytes) plays as the `Loaded IR` cabinet, equal to the model's listening output through
/// `Cabinet::new` of the same file (decoded by the dsp crate's reader) run separately; the instance saves it, a
/// fresh instance reloads it and plays identically. A state with a bad response (a NaN sample) then keeps the
/// running cabinet, plays as before, and logs why.
#[test]
fn an_ir_in_the_state_plays_as_the_cabinet_and_survives_save_and_reload() {
    use breakdown_dsp::cabinet::{Cabinet, ImpulseResponse};
    let rate = 48_000.0;
    let s = PluginSettings::default();
    let bytes = wav_bytes(44_100, &invented_ir(44_100));
    let wav = breakdown_dsp::wav::parse(&bytes, "invented-room.wav", &Default::default()).unwrap();
    let ir = ImpulseResponse {
        channels: wav.audio.channels,
        sample_rate: wav.audio.rate as f64,
    };
    let input = di_signal(rate, 0.2, 0.7);
    let cabinet = Cabinet::new(&ir, rate, 1).expect("our response makes a cabinet");
    let (reference, model_latency) =
        plugin_host::reference_chain_render_with(rate, s, &input, cabinet);
    let (builtin, _) = reference_chain_render(rate, s, &input);
    assert!(
        max_diff(&builtin, &reference).0 > 1e-3,
        "the loaded response plays like the built-in one"
    );

    let template = Instance::new();
    exact_settings(&template, &s);
    template.flush(&[
        ("Listening point", "Tone stack + cabinet"),
        ("Cabinet", "Loaded IR"),
    ]);
    let field = |ir: &str| {
        serde_json::json!({
            "version": 2,
            "scope_ms": 20.0,
            "ir": ir,
            "ir_file": "invented-room.wav",
        })
    };
    let session = state_with_field(&template.save(), field(&base64(&bytes)));
    let render = |inst: &mut Instance| {
        inst.activate(rate, 256);
        let latency = inst.latency() as usize;
        let mut padded = input.clone();
        padded.resize(input.len() + latency, 0.0);
        let out = inst.run(&[padded.clone(), padded], 2, 256);
        inst.deactivate();
        (out, latency)
    };
    let mut a = Instance::new();
    assert!(a.load(&session), "the plugin refused a state with our IR");
    let (out_a, latency) = render(&mut a);
    for (c, ch) in out_a.iter().enumerate() {
        check_against_model(
            &format!("IR from the state, channel {c}"),
            ch,
            &reference,
            latency,
            model_latency,
        );
    }
    let saved = a.save();
    let json: serde_json::Value = serde_json::from_slice(&saved[8..]).unwrap();
    let saved_field: serde_json::Value =
        serde_json::from_str(json["fields"]["breakdown"].as_str().expect("our field")).unwrap();
    assert_eq!(saved_field["ir"].as_str(), Some(base64(&bytes).as_str()));
    let mut b = Instance::new();
    assert!(b.load(&saved), "a fresh instance refused the saved state");
    let (out_b, _) = render(&mut b);
    assert!(out_a == out_b, "output after reloading the state differs");

    // A bad response in a state: the running cabinet stays.
    let mut nan = invented_ir(44_100);
    nan[100] = f32::NAN;
    let bad = state_with_field(&template.save(), field(&base64(&wav_bytes(44_100, &nan))));
    assert!(a.load(&bad));
    let (out_c, _) = render(&mut a);
    assert!(
        out_a == out_c,
        "a refused response changed what the cabinet plays"
    );
    let kept: serde_json::Value = serde_json::from_slice(&a.save()[8..]).unwrap();
    let kept: serde_json::Value =
        serde_json::from_str(kept["fields"]["breakdown"].as_str().unwrap()).unwrap();
    assert_eq!(
        kept["ir"].as_str(),
        Some(base64(&bytes).as_str()),
        "the saved state carries the response that plays, not the refused one"
    );
    match plugin_log_contains("impulse response in the session is refused") {
        Some(found) => assert!(found, "no logged reason for the refused response"),
        None => eprintln!("NICE_LOG set by the caller: the logged reason is not checked"),
    }
}
