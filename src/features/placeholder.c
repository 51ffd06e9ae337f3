/* placeholder until the module lands */ typedef int lk_features_placeholder_t;
