/* placeholder until the module lands */ typedef int lk_engine_placeholder_t;
