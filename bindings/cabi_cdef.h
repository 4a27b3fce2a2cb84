/* cffi declarations of the private bridge between the C wrappers (cabi_source.c) and Python
 * (crowdcore/cabi.py). The public types and constants come from the @cdef block of crowdcore.h.
 * Every extern "Python" function is bound with @ffi.def_extern(error=CC_ERR_INTERNAL), so an
 * exception that escapes Python is never reported to the host as success. */

/* Python -> C: error text (thread-local) and the result of the embedded init code. */
void cc__set_error(const char *text);
void cc__init_report(int32_t failed, const char *text);

/* Python -> C: the world table that cc_world_step and cc_world_is_valid read without Python. */
int32_t cc__slot_open(uint32_t idx, uint32_t gen, void *step);
void cc__slot_close(uint32_t idx);
int32_t cc__slot_lock(uint32_t idx);
void cc__slot_unlock(uint32_t idx);
void cc__slot_touch(uint32_t idx);
uint64_t cc__slot_version(uint32_t idx);
double cc__slot_step_seconds(uint32_t idx);
void cc__set_step_failed(void *handler);

extern "Python" {
    int32_t cc__py_attach_thread(void);
    int32_t cc__py_default_world_def(cc_world_def *);
    int32_t cc__py_default_agent_def(cc_agent_def *);
    int32_t cc__py_world_create(const cc_world_def *, cc_world *);
    int32_t cc__py_world_create_from_scenario_file(const char *, cc_world *);
    int32_t cc__py_world_create_from_scenario_text(const char *, cc_world *);
    int32_t cc__py_world_create_from_snapshot(const void *, int64_t, cc_world *);
    int32_t cc__py_world_create_from_file(const char *, cc_world *);
    int32_t cc__py_world_destroy(cc_world);
    int32_t cc__py_world_add_wall(cc_world, const double *, int32_t, int32_t);
    int32_t cc__py_world_add_obstacle(cc_world, const double *, int32_t);
    int32_t cc__py_world_add_target_circle(cc_world, const char *, double, double, double, int32_t *);
    int32_t cc__py_world_add_target_rect(cc_world, const char *, double, double, double, double, int32_t *);
    int32_t cc__py_world_set_bounds(cc_world, double, double, double, double);
    int32_t cc__py_world_set_params(cc_world, const char *);
    int32_t cc__py_world_add_agents(cc_world, const cc_agent_def *, int32_t, int32_t *);
    int32_t cc__py_world_remove_agents(cc_world, const int32_t *, int32_t);
    int32_t cc__py_world_set_agent_target(cc_world, int32_t, int32_t);
    int32_t cc__py_world_get_step_stats(cc_world, cc_step_stats *);
    int32_t cc__py_world_get_info(cc_world, cc_world_info *);
    int32_t cc__py_world_get_positions(cc_world, double *, int32_t, int32_t *);
    int32_t cc__py_world_get_velocities(cc_world, double *, int32_t, int32_t *);
    int32_t cc__py_world_get_ids(cc_world, int32_t *, int32_t, int32_t *);
    int32_t cc__py_world_get_neighbours(cc_world, double, double, double, int32_t *, int32_t, int32_t *);
    int32_t cc__py_world_state_hash(cc_world, char *, int32_t);
    int32_t cc__py_world_save_snapshot(cc_world, void *, int64_t, int64_t *);
    int32_t cc__py_world_load_snapshot(cc_world, const void *, int64_t);
    int32_t cc__py_world_save_file(cc_world, const char *);
    int32_t cc__py_world_load_file(cc_world, const char *);
    int32_t cc__py_world_record_start(cc_world, const char *);
    int32_t cc__py_world_record_stop(cc_world);
    int32_t cc__py_replay_file(const char *, cc_replay_result *);
}
