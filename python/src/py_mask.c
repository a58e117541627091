/* placeholder */
#include "pyclef.h"
PyMethodDef pyclef_mask_methods[] = {{NULL, NULL, 0, NULL}};
